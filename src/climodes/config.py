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
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import yaml

from climodes.errors import ConfigError

_DATE = re.compile(r"^\d{1,4}(-\d{1,2}(-\d{1,2})?)?$")


# --- value checks: each takes the YAML value and returns the normalised one or raises ValueError


def _choice(*options: str) -> Callable[[Any], str]:
    def check(value: Any) -> str:
        if value not in options:
            hint = " (YAML reads bare no/off/false as a boolean: write none)" if value is False else ""
            raise ValueError(f"expected one of {', '.join(options)}; got {value!r}{hint}")
        return value

    return check


def _boolean(value: Any) -> bool:
    if not isinstance(value, bool):
        raise ValueError(f"expected true or false; got {value!r}")
    return value


def _whole(minimum: int) -> Callable[[Any], int]:
    def check(value: Any) -> int:
        if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
            raise ValueError(f"expected a whole number of {minimum} or more; got {value!r}")
        return value

    return check


_positive_int = _whole(1)


def _text(value: Any) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"expected a non-empty text; got {value!r}")
    return value


def _optional_text(value: Any) -> str | None:
    return None if value is None else _text(value)


def _paths(value: Any) -> list[str]:
    if isinstance(value, str):
        value = [value]
    if not isinstance(value, list) or not value or not all(isinstance(p, str) and p for p in value):
        raise ValueError("expected a list of file paths or glob patterns, e.g. [data/sst_*.nc]")
    return value


def _chunks(value: Any) -> dict[str, int]:
    if not isinstance(value, dict):
        raise ValueError("expected a mapping of axis to chunk length, e.g. {time: 120}")
    for axis, size in value.items():
        if axis not in ("time", "lat", "lon"):
            raise ValueError(f"chunk axis {axis!r} is not one of time, lat, lon")
        _positive_int(size)
    return dict(value)


def _number_pair(low: float, high: float, what: str) -> Callable[[Any], list[float] | None]:
    def check(value: Any) -> list[float] | None:
        if value is None:
            return None
        if (
            not isinstance(value, list)
            or len(value) != 2
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)
        ):
            raise ValueError(f"expected [{what}] as two numbers, or null for no limit; got {value!r}")
        if not all(low <= v <= high for v in value):
            raise ValueError(f"values must lie between {low:g} and {high:g}; got {value!r}")
        return [float(v) for v in value]

    return check


def _date_text(value: Any) -> str:
    text = value.isoformat() if hasattr(value, "isoformat") else str(value)
    if isinstance(value, bool) or not _DATE.match(text):
        raise ValueError(f"expected a date as YYYY, YYYY-MM or YYYY-MM-DD; got {value!r}")
    return text


def _date_key(text: str) -> tuple[int, ...]:
    return tuple(int(p) for p in text.split("-"))


def _period(value: Any) -> list[str] | None:
    if value is None:
        return None
    if not isinstance(value, list) or len(value) != 2:
        raise ValueError(f"expected [START, END], e.g. [1981, 2010], or null; got {value!r}")
    start, end = (_date_text(v) for v in value)
    if _date_key(start) > _date_key(end):
        raise ValueError(f"START {start} comes after END {end}")
    return [start, end]


def _months(value: Any) -> list[int] | None:
    if value is None:
        return None
    if (
        not isinstance(value, list)
        or not value
        or not all(isinstance(m, int) and not isinstance(m, bool) and 1 <= m <= 12 for m in value)
    ):
        raise ValueError(f"expected a list of month numbers 1..12, e.g. [12, 1, 2]; got {value!r}")
    if len(set(value)) != len(value):
        raise ValueError(f"a month is listed twice in {value!r}")
    return value


def _coordinate_value(value: Any) -> float | str | None:
    if value is None or (isinstance(value, (int, float, str)) and not isinstance(value, bool)):
        return value
    raise ValueError(f"expected one coordinate value (a number or a name), or null; got {value!r}")


def _fraction(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 <= value < 1:
        raise ValueError(f"expected a fraction from 0 up to (not including) 1; got {value!r}")
    return float(value)


def _level(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value < 1:
        raise ValueError(f"expected a fraction between 0 and 1 (not included), e.g. 0.95; got {value!r}")
    return float(value)


def _sample_size(value: Any) -> int | str:
    if value == "auto":
        return value
    if isinstance(value, bool) or not isinstance(value, int) or value < 2:
        raise ValueError(f"expected auto or a whole number of 2 or more; got {value!r}")
    return value


def _formats(value: Any) -> list[str]:
    if isinstance(value, str):
        value = [value]
    allowed = ("netcdf", "geotiff")
    if not isinstance(value, list) or not all(v in allowed for v in value) or len(set(value)) != len(value):
        raise ValueError(f"expected a list drawn from {', '.join(allowed)}; got {value!r}")
    if "netcdf" not in value:
        raise ValueError("netcdf is always written (modes.nc is the results file); list geotiff beside it")
    return value


_SIZE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*(B|KB|MB|GB|TB|KiB|MiB|GiB|TiB)\s*$", re.IGNORECASE)
_FACTORS = {"b": 1, "kb": 1e3, "mb": 1e6, "gb": 1e9, "tb": 1e12, "kib": 2**10, "mib": 2**20, "gib": 2**30,
            "tib": 2**40}


def memory_bytes(text: str) -> int:
    """Bytes in a size such as ``"4GB"`` (10^9) or ``"1.5GiB"`` (2^30)."""
    number, unit = _SIZE.match(text).groups()
    return int(float(number) * _FACTORS[unit.lower()])


def _memory(value: Any) -> str:
    if not isinstance(value, str) or not _SIZE.match(value) or memory_bytes(value) < 50e6:
        raise ValueError(f"expected a size of at least 50MB such as \"4GB\" or \"1.5GiB\"; got {value!r}")
    return value.strip()


def _workers(value: Any) -> int | str:
    if value == "auto":
        return value
    return _positive_int(value)


def _key(check: Callable[[Any], Any], doc: str, default: Any = dataclasses.MISSING) -> Any:
    """Declare a config key: its check, a one-line description and its default."""
    if isinstance(default, (list, dict)):
        return field(default_factory=lambda: type(default)(default), metadata={"check": check, "doc": doc})
    return field(default=default, metadata={"check": check, "doc": doc})


# --- the schema


@dataclass(frozen=True)
class InputSection:
    paths: list[str] = _key(_paths, "NetCDF files or glob patterns, read from the config's folder")
    variable: str = _key(_text, "name of the field's variable in the files")
    chunks: dict[str, int] = _key(_chunks, "dask chunk length per axis (time, lat, lon)", {"time": 120})
    cell_area: str | None = _key(_optional_text, "variable in the files holding cell areas (else the one CF "
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
    count: int = _key(_positive_int, "number of modes to keep", 10)
    method: str = _key(_choice("auto", "exact", "gram", "randomized"),
                       "solver: auto chooses from the matrix shape and compute.memory", "auto")
    seed: int = _key(_whole(0), "random seed of the randomized solver and of the red-noise surrogates", 0)
    effective_sample_size: int | str = _key(
        _sample_size, "sample size for North's errors: auto (each mode's from its PC's autocorrelation) or a "
        "number for every mode", "auto"
    )
    noise_surrogates: int = _key(_whole(0), "red-noise surrogate fields for the significance test; 0: no test", 0)
    noise_level: float = _key(_level, "level of the red-noise test: a mode of noise passes with probability "
                              "at most 1 - level", 0.95)


@dataclass(frozen=True)
class ComputeSection:
    memory: str = _key(_memory, "memory the run may use, e.g. 4GB; streaming solvers size their blocks by it", "4GB")
    workers: int | str = _key(_workers, "parallel dask workers: auto (one per core) or a number", "auto")
    scheduler: str = _key(_choice("threads", "processes", "synchronous"), "where dask runs the work", "threads")


@dataclass(frozen=True)
class OutputSection:
    dir: str = _key(_text, "results folder, read from the config's folder", "results")
    formats: list[str] = _key(_formats, "files to write: netcdf (always), geotiff (modes.tif)", ["netcdf"])
    figures: bool = _key(_boolean, "draw a map per mode, the PC series and the variance spectrum", True)
    overwrite: bool = _key(_boolean, "replace an existing results folder", False)


@dataclass(frozen=True)
class RunSpec:
    """A validated run: every key present, every default filled in, paths absolute."""

    source: Path
    input: InputSection
    select: SelectSection
    prepare: PrepareSection
    modes: ModesSection
    compute: ComputeSection
    output: OutputSection

    def to_yaml(self) -> str:
        """The resolved configuration as YAML text (what ``climodes check`` prints)."""
        body = {name: dataclasses.asdict(getattr(self, name)) for name in SECTIONS}
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


def _key_lines(node: yaml.Node, path: tuple[str, ...], lines: dict, problems: list[str], where: str) -> None:
    """Record the line of every mapping key, and report keys given twice."""
    if isinstance(node, yaml.MappingNode):
        seen: set[str] = set()
        for key_node, value_node in node.value:
            key = str(key_node.value)
            line = key_node.start_mark.line + 1
            dotted = ".".join(path + (key,))
            if key in seen:
                problems.append(f"{where}:{line}: {dotted}: given twice; keep one")
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
        The validated run with all defaults filled in.

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
    try:
        data = yaml.safe_load(text)
        root = yaml.compose(text)
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        line = f":{mark.line + 1}" if mark else ""
        reason = getattr(err, "problem", None) or str(err).splitlines()[0]
        raise ConfigError([f"{where}{line}: not valid YAML: {reason}"]) from None
    if not isinstance(data, dict):
        raise ConfigError([f"{where}:1: expected a mapping with sections input, select, prepare, modes, output"])

    problems: list[str] = []
    lines: dict[tuple[str, ...], int] = {}
    _key_lines(root, (), lines, problems, where)
    for name in data:
        if name not in SECTIONS:
            problems.append(f"{where}:{lines.get((str(name),), 1)}: {name}: unknown section{_suggest(name, SECTIONS)}")

    resolved = {}
    for name, cls in SECTIONS.items():
        given = data.get(name) or {}
        line = lines.get((name,), 1)
        if not isinstance(given, dict):
            problems.append(f"{where}:{line}: {name}: expected a mapping of keys; got {given!r}")
            given = {}
        values = {}
        keys = {f.name: f for f in dataclasses.fields(cls)}
        for key, value in given.items():
            key_line = lines.get((name, str(key)), line)
            if key not in keys:
                problems.append(f"{where}:{key_line}: {name}.{key}: unknown key{_suggest(key, keys)}")
                continue
            try:
                values[key] = keys[key].metadata["check"](value)
            except ValueError as err:
                problems.append(f"{where}:{key_line}: {name}.{key}: {err}")
        for key, f in keys.items():
            required = f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING
            if required and key not in given:
                problems.append(f"{where}:{line}: {name}.{key}: required ({f.metadata['doc']})")
        if not problems:
            resolved[name] = cls(**values)
    if problems:
        raise ConfigError(problems)

    spec = RunSpec(source=path.resolve(), **resolved)
    _check_together(spec, lines, where, problems)
    if problems:
        raise ConfigError(problems)
    return _resolve_paths(spec)


def _suggest(word: Any, options) -> str:
    close = difflib.get_close_matches(str(word), list(options), n=1)
    return f"; did you mean {close[0]}?" if close else f"; expected one of {', '.join(options)}"


def _check_together(spec: RunSpec, lines: dict, where: str, problems: list[str]) -> None:
    """Checks that involve more than one key."""

    def report(section: str, key: str, message: str) -> None:
        line = lines.get((section, key), lines.get((section,), 1))
        problems.append(f"{where}:{line}: {section}.{key}: {message}")

    if spec.select.lat and spec.select.lat[0] > spec.select.lat[1]:
        report("select", "lat", f"SOUTH {spec.select.lat[0]:g} is north of NORTH {spec.select.lat[1]:g}")
    if spec.select.lon and spec.select.lon[0] == spec.select.lon[1]:
        report("select", "lon", "WEST and EAST are equal; give a box, or null for all longitudes")
    if spec.prepare.aggregate == "seasonal" and not spec.select.months:
        report("prepare", "aggregate", "seasonal needs select.months, e.g. [12, 1, 2] for winter")
    if spec.prepare.baseline and spec.prepare.anomalies == "none":
        report("prepare", "baseline", "is only used with anomalies: climatology or mean")
    fewest = math.ceil(spec.modes.noise_level / (1 - spec.modes.noise_level) - 1e-9)
    if 0 < spec.modes.noise_surrogates < fewest:
        report("modes", "noise_surrogates", f"{spec.modes.noise_surrogates} surrogates cannot test at "
               f"noise_level {spec.modes.noise_level:g}; give at least {fewest} (100 or more is better)")


def _resolve_paths(spec: RunSpec) -> RunSpec:
    folder = spec.source.parent

    def absolute(p: str) -> str:
        return os.path.normpath(folder / Path(p).expanduser())

    inputs = dataclasses.replace(spec.input, paths=[absolute(p) for p in spec.input.paths])
    output = dataclasses.replace(spec.output, dir=absolute(spec.output.dir))
    return dataclasses.replace(spec, input=inputs, output=output)
