"""The YAML run configuration: schema, defaults and validation.

A config has five sections.  Every key has a type, a check and (except the
two input keys) a default, declared once on the dataclasses below; the
validator, the resolved printout of ``climodes check`` and the documentation
in the README all follow from those declarations.

Every problem is reported as ``FILE:LINE: section.key: what is wrong`` and all
problems are collected before anything is raised, so one ``climodes check``
shows them all.  Relative paths are read from the config file's folder, so a
config kept in version control beside its data runs from anywhere.

Example
-------
>>> spec = load_spec("configs/demo.yaml")          # doctest: +SKIP
>>> spec.modes.count                                # doctest: +SKIP
4
"""

from __future__ import annotations

import dataclasses
import difflib
import glob
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import yaml

from climodes.errors import ConfigError, quoted, shortened

_DATE = re.compile(r"^(\d{1,4})(?:-(\d{1,2})(?:-(\d{1,2}))?)?$")
# The most days each month has in any CF calendar: 31 where the standard calendar has them, 30 in
# February (360_day gives every month 30 days; all_leap gives February 29), from the CF conventions'
# calendar section (common practice).  A date beyond these exists in no calendar.
_MOST_DAYS = (31, 30, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31)
_MONTH_NAMES = ("January", "February", "March", "April", "May", "June", "July", "August", "September",
                "October", "November", "December")
ALIAS_VALUES = 10_000  # values YAML aliases may add to a config, all together
NESTING = 50  # levels of lists and mappings a config may nest (a real one uses three)


# --- value checks: each takes the YAML value and returns the normalised one or raises ValueError


def _choice(*options: str) -> Callable[[Any], str]:
    def check(value: Any) -> str:
        if value not in options:
            hint = (" (YAML reads bare yes/no, on/off and true/false as booleans: write one of the words above)"
                    if isinstance(value, bool) else "")
            raise ValueError(f"expected one of {', '.join(options)}; got {quoted(value)}{hint}")
        return value

    return check


def _boolean(value: Any) -> bool:
    if not isinstance(value, bool):
        raise ValueError(f"expected true or false; got {quoted(value)}")
    return value


def _is_whole(value: Any) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_number(value: Any) -> bool:
    """A finite int or float: YAML reads .inf, .nan and 1.0e+400 as floats that are not."""
    return (_is_whole(value) and abs(value) < 1e300) or (isinstance(value, float) and math.isfinite(value))


def _whole(minimum: int, maximum: int) -> Callable[[Any], int]:
    def check(value: Any) -> int:
        if not _is_whole(value) or not minimum <= value <= maximum:
            raise ValueError(f"expected a whole number from {minimum} to {maximum}; got {quoted(value)}")
        return value

    return check


def _text(value: Any) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"expected a non-empty text; got {quoted(value)}")
    return value


def _name(value: Any) -> str:
    """A variable name in the files: text without NUL characters, of at most 256 bytes (netCDF-C's NC_MAX_NAME)."""
    if "\0" in _text(value):
        raise ValueError(f"a NUL character cannot be part of a variable name; got {quoted(value)}")
    if len(value.encode("utf-8", "surrogatepass")) > 256:
        raise ValueError(f"a NetCDF variable name holds at most 256 bytes; got {quoted(value)}")
    return value


def _optional_name(value: Any) -> str | None:
    return None if value is None else _name(value)


def _path(value: Any) -> str:
    """A file or folder path the system can hold; the length of each name is checked with the folder known."""
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"expected a path; got {quoted(value)}")
    if "\0" in value:
        raise ValueError(f"a path cannot hold a NUL character; got {quoted(value)}")
    try:
        os.fsencode(value)
    except UnicodeError:
        raise ValueError(f"{quoted(value)} holds characters no file name on this system can hold") from None
    return value


def _paths(value: Any) -> list[str]:
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not value or not all(isinstance(p, str) and p for p in value):
        raise ValueError("expected a list of file paths or glob patterns, e.g. [data/sst_*.nc]")
    return [_path(p) for p in value]


def _chunks(value: Any) -> dict[str, int]:
    if not isinstance(value, dict):
        raise ValueError("expected a mapping of axis to chunk length, e.g. {time: 120}")
    for axis, size in value.items():
        if axis not in ("time", "lat", "lon"):
            raise ValueError(f"chunk axis {quoted(axis)} is not one of time, lat, lon")
        _whole(1, 10**9)(size)
    return dict(value)


def _number_pair(low: float, high: float, what: str) -> Callable[[Any], list[float] | None]:
    def check(value: Any) -> list[float] | None:
        if value is None:
            return None
        if not isinstance(value, list) or len(value) != 2 or not all(
                _is_whole(v) or isinstance(v, float) for v in value):
            raise ValueError(f"expected [{what}] as two numbers, or null for no limit; got {quoted(value)}")
        if not all(low <= v <= high for v in value):  # refuses nan and infinities too
            raise ValueError(f"values must lie between {low:g} and {high:g}; got {quoted(value)}")
        return [float(v) for v in value]

    return check


def _date(value: Any) -> str:
    """A date of any CF calendar as ``YYYY``, ``YYYY-MM`` or ``YYYY-MM-DD`` text, zero-padded."""
    text = str(value) if _is_whole(value) else value.isoformat() if hasattr(value, "isoformat") else value
    match = _DATE.match(text) if isinstance(text, str) else None
    if not match:
        raise ValueError(f"expected a date as YYYY, YYYY-MM or YYYY-MM-DD; got {quoted(value)}")
    year, month, day = (int(p) if p else None for p in match.groups())
    if not 1 <= year <= 9999:
        raise ValueError(f"years run from 1 to 9999; got {quoted(value)}")
    if month is not None and not 1 <= month <= 12:
        raise ValueError(f"months run from 1 to 12; got {quoted(value)}")
    if day is not None and not 1 <= day <= _MOST_DAYS[month - 1]:
        raise ValueError(f"{_MONTH_NAMES[month - 1]} has no day {day} in any calendar (at most "
                         f"{_MOST_DAYS[month - 1]}); got {quoted(value)}")
    return "-".join([f"{year:04d}"] + [f"{p:02d}" for p in (month, day) if p is not None])


def date_fields(text: str) -> tuple[int, ...]:
    """``(year,)``, ``(year, month)`` or ``(year, month, day)`` of a date the schema accepted."""
    return tuple(int(p) for p in text.split("-"))


def _period(value: Any) -> list[str] | None:
    if value is None:
        return None
    if not isinstance(value, list) or len(value) != 2:
        raise ValueError(f"expected [START, END], e.g. [1981, 2010], or null; got {quoted(value)}")
    start, end = (_date(v) for v in value)
    first = date_fields(start) + (1, 1)[len(date_fields(start)) - 1:]
    last = date_fields(end) + (12, 31)[len(date_fields(end)) - 1:]
    if first > last:
        raise ValueError(f"START {start} comes after END {end}")
    return [start, end]


def _months(value: Any) -> list[int] | None:
    if value is None:
        return None
    if not isinstance(value, list) or not value or not all(_is_whole(m) and 1 <= m <= 12 for m in value):
        raise ValueError(f"expected a list of month numbers 1..12, e.g. [12, 1, 2]; got {quoted(value)}")
    if len(set(value)) != len(value):
        raise ValueError(f"a month is listed twice in {quoted(value)}")
    return value


def _coordinate_value(value: Any) -> float | str | None:
    if value is None or isinstance(value, str) or _is_number(value):
        return value
    raise ValueError(f"expected one coordinate value (a finite number or a name), or null; got {quoted(value)}")


def _fraction(value: Any) -> float:
    if not _is_number(value) or not 0 <= value < 1:
        raise ValueError(f"expected a fraction from 0 up to (not including) 1; got {quoted(value)}")
    return float(value)


def _level(value: Any) -> float:
    if not _is_number(value) or not 0 < value < 1:
        raise ValueError(f"expected a fraction between 0 and 1 (not included), e.g. 0.95; got {quoted(value)}")
    return float(value)


def _sample_size(value: Any) -> int | str:
    if value == "auto":
        return value
    if not _is_whole(value) or not 2 <= value <= 10**9:
        raise ValueError(f"expected auto or a whole number from 2 to 1000000000; got {quoted(value)}")
    return value


def _formats(value: Any) -> list[str]:
    if isinstance(value, str):
        value = [value]
    allowed = ("netcdf", "geotiff")
    if not isinstance(value, list) or not all(v in allowed for v in value) or len(set(value)) != len(value):
        raise ValueError(f"expected a list drawn from {', '.join(allowed)}; got {quoted(value)}")
    if "netcdf" not in value:
        raise ValueError("netcdf is always written (modes.nc is the results file); list geotiff beside it")
    return value


FIGURE_KINDS = ("maps", "series", "pairs", "spectrum", "residuals")
FIGURE_FORMATS = ("png", "svg", "pdf")


@dataclass(frozen=True)
class FigureOptions:
    """Which figures ``output.figures`` asks for, in which file format and at what resolution."""

    draw: list[str] = field(default_factory=lambda: list(FIGURE_KINDS))
    format: str = "png"
    dpi: int = 200
    local_modes: int | None = None

    def changed(self, **given: Any) -> "FigureOptions":
        """These options with some replaced (``None`` values leave an option as it is), checked again."""
        values = dataclasses.asdict(self) | {k: v for k, v in given.items() if v is not None}
        return figure_options(values)


def figure_options(value: Any) -> FigureOptions | bool:
    """Check ``output.figures``: ``false``, ``true`` (every figure, the defaults) or a mapping of options."""
    if value is False:
        return False
    if value is True:
        return FigureOptions()
    if not isinstance(value, dict):
        raise ValueError(f"expected true, false or a mapping with keys draw, format, dpi, local_modes; got {value!r}")
    unknown = [str(k) for k in value if k not in ("draw", "format", "dpi", "local_modes")]
    if unknown:
        raise ValueError(f"unknown key {unknown[0]}; expected draw, format, dpi or local_modes")
    draw = value.get("draw", list(FIGURE_KINDS))
    if isinstance(draw, str):
        draw = [draw]
    if not isinstance(draw, list) or not draw or not all(d in FIGURE_KINDS for d in draw):
        raise ValueError(f"draw: expected a list drawn from {', '.join(FIGURE_KINDS)}; got {draw!r}")
    kind = value.get("format", "png")
    if kind not in FIGURE_FORMATS:
        raise ValueError(f"format: expected one of {', '.join(FIGURE_FORMATS)}; got {kind!r}")
    dpi = value.get("dpi", 200)
    if isinstance(dpi, bool) or not isinstance(dpi, int) or not 50 <= dpi <= 1200:
        raise ValueError(f"dpi: expected a whole number from 50 to 1200; got {dpi!r}")
    local = value.get("local_modes")
    if local is not None and (isinstance(local, bool) or not isinstance(local, int) or local < 1):
        raise ValueError(f"local_modes: expected a whole number of 1 or more, or null for all modes; got {local!r}")
    return FigureOptions(draw=[k for k in FIGURE_KINDS if k in draw], format=kind, dpi=dpi, local_modes=local)


_SIZE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(B|KB|MB|GB|TB|KiB|MiB|GiB|TiB)\s*$", re.IGNORECASE)
_FACTORS = {"b": 1, "kb": 1e3, "mb": 1e6, "gb": 1e9, "tb": 1e12, "kib": 2**10, "mib": 2**20, "gib": 2**30,
            "tib": 2**40}


def size_text(nbytes: float) -> str:
    """A size in bytes as climodes' messages give it: in GB from 0.1 GB, else in MB (one decimal below 10 MB)."""
    if nbytes >= 1e8:
        return f"{nbytes / 1e9:.2f} GB"
    return f"{nbytes / 1e6:.1f} MB" if nbytes < 1e7 else f"{nbytes / 1e6:.0f} MB"


def memory_bytes(text: str) -> int:
    """Bytes in a size such as ``"4GB"`` (10^9) or ``"1.5GiB"`` (2^30)."""
    number, unit = _SIZE.match(text).groups()
    return int(float(number) * _FACTORS[unit.lower()])


def checked_memory(value: Any) -> str:
    """``value`` if it is a size climodes accepts for ``compute.memory`` (50MB to 1PB), else ValueError."""
    return _memory(value)


def _memory(value: Any) -> str:
    match = _SIZE.match(value) if isinstance(value, str) else None
    size = float(match.group(1)) * _FACTORS[match.group(2).lower()] if match else 0.0  # inf for 400 digits
    if not 50e6 <= size <= 1e15:
        raise ValueError(f"expected a size from 50MB to 1PB such as \"4GB\" or \"1.5GiB\"; got {quoted(value)}")
    return value.strip()


def _workers(value: Any) -> int | str:
    if value == "auto":
        return value
    return _whole(1, 4096)(value)


_WALLTIME = re.compile(r"^\d{1,4}:[0-5]\d:[0-5]\d$")


def _walltime(value: Any) -> str:
    if value == "auto" or (isinstance(value, str) and _WALLTIME.match(value) and value != "0:00:00"):
        return value
    raise ValueError(f"expected a time limit as HH:MM:SS, e.g. \"02:30:00\", or auto; got {quoted(value)}")


def _directives(value: Any) -> list[str]:
    if not isinstance(value, list) or not all(isinstance(v, str) and v.strip() and "\n" not in v for v in value):
        raise ValueError(f"expected a list of one-line batch options, e.g. [--qos=short]; got {quoted(value)}")
    return [v.strip() for v in value]


def _optional_text(value: Any) -> str | None:
    if value is None:
        return None
    if "\0" in _text(value) or "\n" in value:
        raise ValueError(f"expected one line of text without NUL characters; got {quoted(value)}")
    return value


def _address(value: Any) -> str | None:
    if value is None:
        return None
    if not isinstance(value, str) or not re.match(r"^(tcp|tls|inproc|ucx)://\S+:\d+$", value):
        raise ValueError(f"expected a dask scheduler address such as tcp://10.1.2.3:8786, or null; got {quoted(value)}")
    return value


def _key(check: Callable[[Any], Any], doc: str, default: Any = dataclasses.MISSING) -> Any:
    """Declare a config key: its check, a one-line description and its default."""
    if isinstance(default, (list, dict)):
        return field(default_factory=lambda: type(default)(default), metadata={"check": check, "doc": doc})
    return field(default=default, metadata={"check": check, "doc": doc})


# --- the schema


@dataclass(frozen=True)
class InputSection:
    paths: list[str] = _key(_paths, "NetCDF files, Zarr stores (*.zarr) or glob patterns, read from the config's folder")
    variable: str = _key(_name, "name of the field's variable in the files")
    chunks: dict[str, int] = _key(_chunks, "dask chunk length per axis (time, lat, lon)", {"time": 120})
    cell_area: str | None = _key(_optional_name, "variable in the files holding cell areas (else the one CF "
                                 "cell_measures names)", None)


@dataclass(frozen=True)
class SelectSection:
    lat: list[float] | None = _key(_number_pair(-90, 90, "SOUTH, NORTH"), "latitude band [S, N]", None)
    lon: list[float] | None = _key(
        _number_pair(-360, 360, "WEST, EAST"), "longitude box [W, E]; W > E crosses the dateline", None
    )
    period: list[str] | None = _key(_period, "first and last date kept [START, END]", None)
    months: list[int] | None = _key(_months, "calendar months kept, in season order, e.g. [12, 1, 2]", None)
    level: float | str | None = _key(_coordinate_value, "value of the vertical axis to analyse, e.g. 500", None)
    member: float | str | None = _key(_coordinate_value, "value of the ensemble axis to analyse, e.g. 3", None)


@dataclass(frozen=True)
class PrepareSection:
    aggregate: str = _key(_choice("none", "seasonal", "annual"), "one mean per season/year, or none", "none")
    anomalies: str = _key(
        _choice("climatology", "mean", "none"), "remove the baseline climatology, the baseline mean, or nothing",
        "climatology",
    )
    baseline: list[str] | None = _key(_period, "period of the climatology [START, END]; null: all steps", None)
    detrend: str = _key(_choice("none", "linear"), "remove a least-squares linear trend at each point", "none")
    standardize: bool = _key(_boolean, "divide each point by its standard deviation (correlation EOFs)", False)
    weighting: str = _key(
        _choice("coslat", "cell_area", "none"), "sqrt(cos(lat)), sqrt(cell area), or no weighting", "coslat"
    )
    max_missing: float = _key(
        _fraction, "drop points missing at more than this fraction of steps; others: missing anomaly = 0", 0.1
    )


@dataclass(frozen=True)
class ModesSection:
    count: int = _key(_whole(1, 100_000), "number of modes to keep", 10)
    method: str = _key(_choice("auto", "exact", "gram", "randomized"),
                       "solver: auto chooses from the matrix shape and compute.memory", "auto")
    seed: int = _key(_whole(0, 2**32 - 1), "random seed of the randomized solver and of the red-noise surrogates", 0)
    effective_sample_size: int | str = _key(
        _sample_size, "sample size for North's errors: auto (each mode's from its PC's autocorrelation) or a "
        "number for every mode", "auto"
    )
    noise_surrogates: int = _key(_whole(0, 100_000), "red-noise surrogate fields for the significance test; 0: no test", 0)
    noise_level: float = _key(_level, "level of the red-noise test: a mode of noise passes with probability "
                              "at most 1 - level", 0.95)
    rotate: str = _key(_choice("none", "varimax"), "rotate the kept modes: varimax (of the EOFs scaled by the square "
                       "root of their eigenvalues) or none", "none")


@dataclass(frozen=True)
class ComputeSection:
    memory: str = _key(_memory, "memory the run may use, e.g. 4GB; streaming solvers size their blocks by it", "4GB")
    workers: int | str = _key(_workers, "dask workers on this machine: auto (one per core of the machine, or of "
                              "the batch job it runs in) or a number", "auto")
    scheduler: str = _key(_choice("threads", "processes", "slurm", "pbs", "synchronous"),
                          "where dask runs: threads, processes (a local cluster), slurm or pbs (worker batch jobs), "
                          "synchronous (debugging)", "threads")
    jobs: int = _key(_whole(1, 4096), "slurm/pbs: number of worker batch jobs", 2)
    job_cores: int = _key(_whole(1, 4096), "slurm/pbs: cores of each worker job (its dask threads)", 4)
    job_memory: str = _key(_memory, "slurm/pbs: memory of each worker job", "8GB")
    walltime: str = _key(_walltime, "time limit of batch jobs, HH:MM:SS; auto: estimated from the field and solver",
                         "auto")
    queue: str | None = _key(_optional_text, "batch queue (SLURM partition) of batch jobs; null: the default", None)
    account: str | None = _key(_optional_text, "account charged for batch jobs; null: your default", None)
    directives: list[str] = _key(_directives, "more batch options, one per line of the script, e.g. [--qos=short]",
                                 [])
    interface: str | None = _key(_optional_text, "slurm/pbs: network interface the dask scheduler and workers "
                                 "talk over, e.g. ib0; null: dask's choice", None)
    address: str | None = _key(_address, "slurm/pbs: join the dask scheduler running at this address (its "
                               "workers) instead of starting worker jobs", None)
    worker_wait: int = _key(_whole(1, 86_400), "slurm/pbs: seconds to wait for the worker jobs to start, and for a lost "
                            "worker's replacement", 300)


@dataclass(frozen=True)
class OutputSection:
    dir: str = _key(_path, "results folder, read from the config's folder", "results")
    formats: list[str] = _key(_formats, "files to write: netcdf (always), geotiff (modes.tif)", ["netcdf"])
    figures: FigureOptions | bool = _key(
        figure_options, "figures: true (all, defaults), false (none), or a mapping of draw, format, dpi, local_modes",
        FigureOptions()
    )
    overwrite: bool = _key(_boolean, "replace an existing results folder", False)


@dataclass(frozen=True)
class RunSpec:
    """A validated run: every key present, every default filled in, paths absolute.

    ``written`` keeps each path key as the config wrote it beside its absolute form, so that the text
    recorded with the results (:meth:`to_yaml`) is the same in every checkout of the config.
    """

    source: Path
    input: InputSection
    select: SelectSection
    prepare: PrepareSection
    modes: ModesSection
    compute: ComputeSection
    output: OutputSection
    written: dict[tuple[str, str], tuple[Any, Any]] = field(default_factory=dict, compare=False)
    given: tuple[str, ...] = field(default=(), compare=False)  # the sections the config wrote (the rest: defaults)

    def projection_yaml(self) -> str:
        """The sections a projection uses, as YAML text: its prepare and modes are those of the run whose
        modes it projects onto (that run's modes.nc keeps them), whatever this config says."""
        return (self.to_yaml(("input", "select", "compute", "output"))
                + "# prepare, modes: those of the run whose modes are projected onto (climodes_results)\n")

    def to_yaml(self, sections: tuple[str, ...] | None = None) -> str:
        """The configuration with every default filled in, as YAML text (what ``climodes check`` prints): all
        its sections, or those named.

        Paths appear as the config wrote them (relative ones are read from the config's folder), so the
        text does not depend on where the config is kept.
        """
        body = {name: dataclasses.asdict(getattr(self, name)) for name in sections or SECTIONS}
        for (section, key), (as_written, absolute) in self.written.items():
            if section in body and body[section][key] == absolute:  # not replaced since the config was read
                body[section][key] = as_written
        return yaml.safe_dump(body, sort_keys=False, default_flow_style=None, width=100)


SECTIONS = {
    "input": InputSection,
    "select": SelectSection,
    "prepare": PrepareSection,
    "modes": ModesSection,
    "compute": ComputeSection,
    "output": OutputSection,
}


# --- loading


class _Refused(yaml.MarkedYAMLError):
    """YAML that parses but that a config may not hold (alias bombs, recursive aliases, deep nesting)."""


_TIMESTAMP = "tag:yaml.org,2002:timestamp"


class _ConfigLoader(yaml.SafeLoader):
    """PyYAML's safe loader with three limits, checked while the document is composed.

    Aliases may add at most ``ALIAS_VALUES`` values to the document all together (an "alias bomb" of
    nested aliases would otherwise expand exponentially), an alias may not stand for a value that holds
    it (a recursive alias), and lists and mappings may not nest more than ``NESTING`` deep.  Dates stay
    text (the schema checks them, so 2001-02-30 is reported, not a crash of Python's date).
    """

    yaml_implicit_resolvers = {
        first: [(tag, regexp) for tag, regexp in resolvers if tag != _TIMESTAMP]
        for first, resolvers in yaml.SafeLoader.yaml_implicit_resolvers.items()
    }

    def __init__(self, stream: str):
        super().__init__(stream)
        self._values: dict[int, int] = {}  # id(node): values it holds with its aliases expanded
        self._added = 0  # values the aliases have added so far
        self._open: list[str | None] = []  # anchors of the nodes being composed, outermost first

    def compose_node(self, parent: yaml.Node | None, index: Any) -> yaml.Node:
        event = self.peek_event()
        if isinstance(event, yaml.AliasEvent):
            if event.anchor in self._open:
                raise _Refused(None, None, f"the alias *{shortened(event.anchor)} stands for a value that holds "
                               "it (a recursive alias); write the value out", event.start_mark)
            node = super().compose_node(parent, index)
            self._added += self._values[id(node)]
            if self._added > ALIAS_VALUES:
                raise _Refused(None, None, f"YAML aliases expand to more than {ALIAS_VALUES} values here; "
                               "write the values out instead of nesting aliases", event.start_mark)
            return node
        if len(self._open) >= NESTING:
            raise _Refused(None, None, f"lists and mappings nested more than {NESTING} deep", event.start_mark)
        self._open.append(getattr(event, "anchor", None))
        try:
            node = super().compose_node(parent, index)
        finally:
            self._open.pop()
        if isinstance(node, yaml.MappingNode):
            children = [child for pair in node.value for child in pair]
        else:
            children = node.value if isinstance(node, yaml.SequenceNode) else []
        self._values[id(node)] = 1 + sum(self._values[id(child)] for child in children)
        return node

    def construct_object(self, node: yaml.Node, deep: bool = False) -> Any:
        try:
            return super().construct_object(node, deep)
        except (ValueError, TypeError, OverflowError):  # e.g. !!int abc, !!timestamp 2001-02-30
            raise _Refused(None, None, f"cannot read {quoted(node.value)} as YAML {node.tag.split(':')[-1]}",
                           node.start_mark) from None


def _parse(text: str, where: str, lines: dict, problems: list[str]) -> Any:
    """The YAML document in ``text``; the line of each key goes to ``lines`` (see :func:`_key_lines`)."""
    loader = _ConfigLoader(text)
    try:
        root = loader.get_single_node()
        if root is None:
            return None
        _key_lines(root, (), lines, problems, where)  # before merge keys (<<) are folded into their mappings
        return loader.construct_document(root)
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        line = f":{mark.line + 1}" if mark else ""
        reason = getattr(err, "problem", None) or str(err).splitlines()[0]
        if not isinstance(err, _Refused):
            reason = f"not valid YAML: {shortened(str(reason), 100)}"
        raise ConfigError([f"{where}{line}: {reason}"]) from None
    finally:
        loader.dispose()


def _key_lines(node: yaml.Node, path: tuple[str, ...], lines: dict, problems: list[str], where: str) -> None:
    """Record the line of every mapping key, and report keys given twice."""
    if isinstance(node, yaml.MappingNode):
        seen: set[str] = set()
        for key_node, value_node in node.value:
            key = str(key_node.value)
            line = key_node.start_mark.line + 1
            dotted = ".".join(path + (key,))
            if key in seen:
                problems.append(f"{where}:{line}: {shortened(dotted)}: given twice; keep one")
            seen.add(key)
            lines[path + (key,)] = line
            _key_lines(value_node, path + (key,), lines, problems, where)


def load_spec(config_path: str | Path) -> RunSpec:
    """Read, validate and resolve a YAML run configuration.

    Parameters
    ----------
    config_path
        Path of the YAML file.

    Returns
    -------
    RunSpec
        The validated run with all defaults filled in and its paths made absolute.

    Raises
    ------
    ConfigError
        With one ``FILE:LINE: key: problem`` line per problem found.
    """
    path = Path(config_path)
    where = str(path)
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        raise ConfigError([f"{where}: cannot read the config ({getattr(err, 'strerror', None) or err})"]) from None
    problems: list[str] = []
    lines: dict[tuple[str, ...], int] = {}
    data = _parse(text, where, lines, problems)
    return _validated(data, path.resolve(), where, lines, problems)


MAPPING_NAME = "config"  # how a config given as a mapping is named in its problems, where a file's name would be


def spec_from_mapping(data: Any, folder: str | Path | None = None) -> RunSpec:
    """Validate and resolve a run configuration given as a mapping (the YAML file's content as Python).

    The checks and messages are those of :func:`load_spec`; each problem starts with ``config:``
    where a file's problems start with ``FILE:LINE:``.

    Parameters
    ----------
    data
        ``{"input": {...}, "select": {...}, ...}``, the sections of a config.
    folder
        Folder that relative paths are read from (the working folder by default), as a config
        file's own folder is.

    Raises
    ------
    ConfigError
        With one ``config: key: problem`` line per problem found.
    """
    base = Path(folder if folder is not None else os.getcwd()).resolve()
    return _validated(_plain(data), base / MAPPING_NAME, MAPPING_NAME, None, [])


def _plain(value: Any) -> Any:
    """``value`` with numpy's numbers and arrays (as a notebook's arithmetic gives them) turned into the
    Python numbers and lists a YAML file would give."""
    if isinstance(value, dict):
        return {key: _plain(item) for key, item in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(item) for item in value]
    if type(value).__module__ == "numpy" and hasattr(value, "tolist"):
        return value.tolist()
    return value


def _at(where: str, lines: dict | None, path: tuple[str, ...], fallback: tuple[str, ...] = ()) -> str:
    """``FILE:LINE`` of the key at ``path`` (else of ``fallback``, else line 1); plain ``where`` without lines."""
    if lines is None:
        return where
    return f"{where}:{lines.get(path, lines.get(fallback, 1))}"


def _validated(data: Any, source: Path, where: str, lines: dict | None, problems: list[str]) -> RunSpec:
    """The :class:`RunSpec` of a config's parsed content; ``lines`` maps keys to lines (None: no lines)."""
    if not isinstance(data, dict):
        raise ConfigError([f"{_at(where, lines, ())}: expected a mapping with sections input, select, prepare, "
                           "modes, output"])
    for name in data:
        if name not in SECTIONS:
            problems.append(f"{_at(where, lines, (str(name),))}: {shortened(str(name))}: unknown section"
                            f"{_suggest(name, SECTIONS)}")

    resolved = {}
    for name, cls in SECTIONS.items():
        given = data.get(name) or {}
        at = _at(where, lines, (name,))
        if not isinstance(given, dict):
            problems.append(f"{at}: {name}: expected a mapping of keys; got {quoted(given)}")
            given = {}
        values = {}
        keys = {f.name: f for f in dataclasses.fields(cls)}
        for key, value in given.items():
            key_at = _at(where, lines, (name, str(key)), (name,))
            if key not in keys:
                problems.append(f"{key_at}: {name}.{shortened(str(key))}: unknown key{_suggest(key, keys)}")
                continue
            if value == UNFILLED or value == [UNFILLED]:
                problems.append(f"{key_at}: {name}.{key}: still {UNFILLED}, as `climodes template` left it; fill it "
                                f"in ({keys[key].metadata['doc']})")
                continue
            try:
                values[key] = keys[key].metadata["check"](value)
            except ValueError as err:
                problems.append(f"{key_at}: {name}.{key}: {err}")
        for key, f in keys.items():
            required = f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING
            if required and key not in given:
                problems.append(f"{at}: {name}.{key}: required ({f.metadata['doc']})")
        if not problems:
            resolved[name] = cls(**values)
    if problems:
        raise ConfigError(_by_line(problems))
    spec = RunSpec(source=source, **resolved, given=tuple(name for name in SECTIONS if data.get(name)))
    _check_together(spec, lines, where, problems)
    _check_name_lengths(spec, lines, where, problems)
    if problems:
        raise ConfigError(_by_line(problems))
    return _resolve_paths(spec)


def _by_line(problems: list[str]) -> list[str]:
    """The problems in the order of their lines in the file (``FILE:LINE: ...``), as an editor shows them."""
    def line(problem: str) -> int:
        number = problem.split(": ", 1)[0].rsplit(":", 1)[-1]
        return int(number) if number.isdigit() else 0

    return sorted(problems, key=line)


UNFILLED = "REQUIRED"  # what the template writes for a key without a default


def template() -> str:
    """A config with every key at its default, each with what it means: a start for a new run.

    The two keys without a default are left for the user to fill in.
    """
    lines = ["# A climodes run. Relative paths are read from this file's folder; `climodes check` validates it.",
             "# Every key is shown at its default: delete the ones you keep as they are."]
    for name, cls in SECTIONS.items():
        lines.append(f"{name}:")
        for f in dataclasses.fields(cls):
            required = f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING
            default = None if required else (f.default if f.default_factory is dataclasses.MISSING
                                             else f.default_factory())
            if dataclasses.is_dataclass(default):
                default = dataclasses.asdict(default)
            value = UNFILLED if required else yaml.safe_dump(default, default_flow_style=True, width=10**6).strip()
            value = value.removesuffix("\n...").removesuffix(" ...")
            lines.append(f"  {f.name}: {value}  # {f.metadata['doc']}")
    return "\n".join(lines) + "\n"


def _suggest(word: Any, options) -> str:
    close = difflib.get_close_matches(str(word), list(options), n=1)
    return f"; did you mean {close[0]}?" if close else f"; expected one of {', '.join(options)}"


def _check_together(spec: RunSpec, lines: dict | None, where: str, problems: list[str]) -> None:
    """Checks that involve more than one key."""

    def report(section: str, key: str, message: str) -> None:
        problems.append(f"{_at(where, lines, (section, key), (section,))}: {section}.{key}: {message}")

    if spec.select.lat and spec.select.lat[0] > spec.select.lat[1]:
        report("select", "lat", f"SOUTH {spec.select.lat[0]:g} is north of NORTH {spec.select.lat[1]:g}")
    if spec.select.lon and spec.select.lon[0] == spec.select.lon[1]:
        report("select", "lon", "WEST and EAST are equal; give a box, or null for all longitudes")
    if spec.prepare.aggregate == "seasonal" and not spec.select.months:
        report("prepare", "aggregate", "seasonal needs select.months, e.g. [12, 1, 2] for winter")
    if spec.prepare.baseline and spec.prepare.anomalies == "none":
        report("prepare", "baseline", "is only used with anomalies: climatology or mean")
    if spec.compute.address and spec.compute.scheduler not in ("slurm", "pbs"):
        report("compute", "address", "joins a running dask scheduler with compute.scheduler slurm or pbs; "
                                     "set compute.scheduler, or remove compute.address")

    fewest = math.ceil(spec.modes.noise_level / (1 - spec.modes.noise_level) - 1e-9)
    if 0 < spec.modes.noise_surrogates < fewest:
        report("modes", "noise_surrogates", f"{spec.modes.noise_surrogates} surrogates cannot test at "
               f"noise_level {spec.modes.noise_level:g}; give at least {fewest} (100 or more is better)")


def _name_max(folder: Path) -> int:
    """The longest file name (in bytes) the file system of ``folder`` allows; 255 where it does not say."""
    try:
        limit = os.pathconf(folder, "PC_NAME_MAX")
    except (OSError, ValueError, AttributeError):  # AttributeError: no pathconf on this system
        return 255
    return limit if limit > 0 else 255


def _check_name_lengths(spec: RunSpec, lines: dict | None, where: str, problems: list[str]) -> None:
    """Every name in a path (between separators) must fit the file system's limit; glob patterns may be longer."""
    limit = _name_max(spec.source.parent)
    for section, key, paths in (("input", "paths", spec.input.paths), ("output", "dir", [spec.output.dir])):
        for p in paths:
            long = [part for part in Path(p).parts if len(os.fsencode(part)) > limit and not glob.has_magic(part)]
            if long:
                problems.append(f"{_at(where, lines, (section, key), (section,))}: {section}.{key}: the name {quoted(long[0])} is "
                                f"{len(os.fsencode(long[0]))} bytes long; this system allows {limit}")


def _resolve_paths(spec: RunSpec) -> RunSpec:
    folder = spec.source.parent

    def absolute(p: str) -> str:
        return os.path.normpath(folder / os.path.expanduser(p))

    inputs = dataclasses.replace(spec.input, paths=[absolute(p) for p in spec.input.paths])
    output = dataclasses.replace(spec.output, dir=absolute(spec.output.dir))
    written = {("input", "paths"): (spec.input.paths, inputs.paths), ("output", "dir"): (spec.output.dir, output.dir)}
    return dataclasses.replace(spec, input=inputs, output=output, written=written)
