"""Every text a person reads about a run: the modes table, run.log, ``climodes show`` and ``report.html``.

The variance table is formatted here once (:func:`mode_rows`) and used by the
run's summary, ``climodes show``, the figures' labels and the report, so the
four never disagree.  Everything is read from a results dataset (``modes.nc``
and the config stored in it), never from the input files.

Example
-------
>>> from climodes.results import open_results              # doctest: +SKIP
>>> print("\\n".join(variance_table(open_results("results/demo"))))   # doctest: +SKIP
mode  variance explained  separated (North)
   1      23.3% +/-  2.6%   yes
"""

from __future__ import annotations

import base64
import html
import re
import textwrap
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xarray as xr
import yaml

from climodes import __version__
from climodes.grid import map_coordinates
from climodes.results import open_results

# --- one row of the modes table


@dataclass(frozen=True)
class ModeRow:
    """The text of one mode's row, whatever the medium (terminal, figure, web page)."""

    mode: int
    share: str  # variance explained, e.g. "23.3%"
    error: str  # its North et al. (1982) sampling error, e.g. "2.6%"
    separated: bool
    significant: bool | None  # None where the significance test did not run
    sample_size: str | None  # the mode's own effective sample size, where the file has it
    noise: str | None = None  # the red-noise eigenvalue at its rank, as a share of the total variance

    def variance(self, plus_minus: str = "\u00b1") -> str:
        """``"23.3% ± 2.6%"``; terminals and logs get ``"+/-"``."""
        return f"{self.share} {plus_minus} {self.error}"

    @property
    def flags(self) -> list[str]:
        """Why the mode should be read with care: empty for a separated (and significant) mode."""
        out = [] if self.separated else ["not separated: mixed with a neighbour (North's rule)"]
        if self.significant is False:
            out.append("not significant: within red noise")
        return out


def percent(fraction: float) -> str:
    """A fraction as people read it in the modes table, with two significant digits at least:
    ``0.2334 -> "23.3%"``, ``0.00042 -> "0.042%"`` (never a bare "0.0%" for a small, non-zero share).

    >>> percent(0.2334), percent(0.00042), percent(0.0)
    ('23.3%', '0.042%', '0.0%')
    >>> percent(0.005)
    '0.50%'
    """
    share = 100 * fraction
    if share == 0 or abs(share) >= 1 or not np.isfinite(share):
        return f"{share:.1f}%"
    return f"{share:#.2g}%"


def mode_rows(ds: xr.Dataset) -> list[ModeRow]:
    """The rows of the modes table of a results dataset."""
    count = ds.sizes["mode"]
    separated = ds["separated"].values if "separated" in ds else np.ones(count)
    significant = ds["significant"].values if "significant" in ds else [None] * count
    sizes = ds["effective_sample_size"].values if "effective_sample_size" in ds else [None] * count
    total = float(ds["eigenvalue"].attrs.get("total_variance", np.nan))
    noise = ds["noise_eigenvalue"].values / total if "noise_eigenvalue" in ds else [None] * count
    return [
        ModeRow(mode=int(ds["mode"].values[k]), share=percent(float(ds["variance_explained"][k])),
                error=percent(float(ds["variance_explained_error"][k])), separated=bool(separated[k]),
                significant=None if significant[k] is None else bool(significant[k]),
                sample_size=None if sizes[k] is None else f"{float(sizes[k]):.0f}",
                noise=None if noise[k] is None else percent(float(noise[k])))
        for k in range(count)
    ]


def variance_table(ds: xr.Dataset) -> list[str]:
    """The modes table as plain text lines: the run's summary, ``run.log`` and ``climodes show``.

    One row per mode: variance explained with its North et al. (1982) error, the mode's own effective
    sample size, North's rule, and, when the red-noise test ran, the noise eigenvalue (as a share of the
    total variance) and the verdict; then a line saying what the columns mean, and the variance of the
    rotated modes when the file has them.  Columns a file does not hold are left out.
    """
    rows = mode_rows(ds)
    sized, tested = rows[0].sample_size is not None, rows[0].significant is not None
    level = float(ds["noise_eigenvalue"].attrs.get("level", np.nan)) if tested else np.nan
    noise = f"red noise {100 * level:g}%"
    header = f"mode  {'variance explained':<19}" + (f"  {'effective N':>11}" if sized else "") + \
        f"  {'separated (North)':<17}" + (f"  {noise:>13}  significant" if tested else "")
    lines = [header.rstrip()]
    for row in rows:
        line = f"{row.mode:>4}  {row.share:>7} +/- {row.error:<7}"
        if sized:
            line += f"  {row.sample_size:>11}"
        line += f"  {'yes' if row.separated else 'no, mixed':<17}"
        if tested:
            line += f"  {row.noise:>13}  {'yes' if row.significant else 'no'}"
        lines.append(line.rstrip())
    if sized:
        lines.append(f"effective N: each mode's own effective sample size, of {ds['pc'].shape[1]} time steps")
    if tested:
        lines.append(f"red noise {100 * level:g}%: that level of the eigenvalues at the same rank of "
                     f"{int(ds['noise_eigenvalue'].attrs.get('surrogates', 0))} red-noise fields")
        lines.append("significant: above it, counted from mode 1 up to the first mode that is not")
    if "rotated_variance_explained" in ds:
        shares = ", ".join(percent(float(v)) for v in ds["rotated_variance_explained"].values)
        lines.append(f"varimax-rotated modes: {shares} of the variance (together as much as the {len(rows)} "
                     "modes above)")
    return lines


# --- what the run was about, in words (titles, summaries)


def stored_config(ds: xr.Dataset) -> dict:
    """The resolved config the results were made with (an empty mapping if the file lacks it)."""
    try:
        config = yaml.safe_load(ds.attrs.get("climodes_config", "")) or {}
    except yaml.YAMLError:
        return {}
    return config if isinstance(config, dict) else {}


def long_name_of(ds: xr.Dataset) -> str:
    """The input field's long name, as the EOF maps' long name keeps it (empty if it does not)."""
    return ds["eof"].attrs.get("long_name", "").removeprefix("EOF map of ").split(":")[0].strip()


def field_text(ds: xr.Dataset) -> str:
    """The analysed field: its long name and variable name, e.g. ``"sea surface temperature (sst)"``."""
    long_name = long_name_of(ds)
    variable = (stored_config(ds).get("input") or {}).get("variable")
    if long_name and variable and long_name != variable:
        return f"{long_name} ({variable})"
    return long_name or variable or "the field"


_SUPERSCRIPT = str.maketrans("-0123456789", "\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079")
_CELSIUS = {"degc", "deg_c", "degree_c", "degrees_c", "degreec", "degreesc", "celsius", "degree_celsius",
            "degrees_celsius", "\u00b0c"}
_KELVIN = {"k", "degk", "deg_k", "degree_k", "degrees_k", "kelvin"}
_TERM = re.compile(r"^([A-Za-z%\u00b0\u00b5]+)(-?\d+)?$")


def units_text(units: str | None) -> str:
    """CF/UDUNITS units as people write them: ``degC -> °C``, ``mm day-1 -> mm/day``, ``m s-1 -> m/s``.

    A single unit with a power of -1 becomes a division (``W m-2`` stays a
    product with a superscript, ``W m⁻²``); ``1`` (standardised fields) and
    anything not understood are left as they are.
    """
    if units is None or not str(units).strip():
        return ""
    text = str(units).strip()
    squared = re.fullmatch(r"\((.+)\)\^?2", text)
    if squared:
        return _squared(units_text(squared.group(1)))
    if text.lower() in _CELSIUS:
        return "\u00b0C"
    if text.lower() in _KELVIN:
        return "K"
    if text.lower() == "percent":
        return "%"
    terms = [_TERM.match(part) for part in text.replace(".", " ").split()]
    if not terms or not all(terms):
        return text
    above = [(m.group(1), int(m.group(2) or 1)) for m in terms if int(m.group(2) or 1) > 0]
    below = [(m.group(1), -int(m.group(2))) for m in terms if m.group(2) and int(m.group(2)) < 0]

    def power(name: str, p: int) -> str:
        return name if p == 1 else name + str(p).translate(_SUPERSCRIPT)

    top = " ".join(power(n, p) for n, p in above)
    if len(below) == 1 and below[0][1] == 1 and top:
        return f"{top}/{below[0][0]}"
    return " ".join([top] * bool(top) + [power(n, -p) for n, p in below])


def _squared(units: str) -> str:
    if not units or units == "1":
        return units
    return f"{units}\u00b2" if re.fullmatch(r"[^\s/]+", units) else f"({units})\u00b2"


def level_text(ds: xr.Dataset) -> str | None:
    """The analysed level: a scalar coordinate of the maps (``500 hPa``), else ``select.level`` of the config."""
    for name, coord in ds["eof"].coords.items():
        if coord.ndim == 0 and name not in ("crs",) and coord.dtype.kind in "if":
            value = float(coord.values)
            return f"{name} {value:g} {units_text(coord.attrs.get('units'))}".strip()
    level = (stored_config(ds).get("select") or {}).get("level")
    return None if level is None else f"level {level}"


_MONTH_LETTERS = "JFMAMJJASOND"
_MONTH_NAMES = ["January", "February", "March", "April", "May", "June", "July", "August", "September", "October",
                "November", "December"]


def months_text(months: list[int] | None) -> str:
    """``[12, 1, 2] -> "DJF"``, ``[7] -> "July"``, scattered months listed; ``None -> "all months"``."""
    if not months or len(months) == 12:
        return "all months"
    if len(months) == 1:
        return _MONTH_NAMES[months[0] - 1]
    consecutive = all((b - a) % 12 == 1 for a, b in zip(months, months[1:]))
    if consecutive:
        return "".join(_MONTH_LETTERS[m - 1] for m in months)
    return "months " + ", ".join(_MONTH_NAMES[m - 1][:3] for m in months)


def steps_text(ds: xr.Dataset) -> str:
    """What one time step is: ``daily``, ``monthly``, ``seasonal means`` ... (from the stored config and the axis)."""
    config = stored_config(ds)
    months = (config.get("select") or {}).get("months")
    aggregate = (config.get("prepare") or {}).get("aggregate", "none")
    if aggregate == "seasonal":
        return f"{months_text(months)} means"
    if aggregate == "annual":
        return "annual means"
    days = step_days(ds)
    kind = ("daily" if days < 1.5 else "monthly" if 25 <= days <= 35 else "annual" if 350 <= days <= 380
            else f"every {days:g} days")
    return kind if not months or len(months) == 12 else f"{kind}, {months_text(months)}"


def time_axis(ds: xr.Dataset) -> xr.DataArray:
    """The time coordinate of the PCs."""
    return ds[ds["pc"].dims[1]]


def step_days(ds: xr.Dataset) -> float:
    """The typical spacing of the time steps in days (the median; 0 for a single step)."""
    time = time_axis(ds)
    if time.size < 2:
        return 0.0
    years = time.dt.year.values + (time.dt.dayofyear.values - 1) / 365.25
    return round(float(np.median(np.diff(years))) * 365.25, 0)


def period_text(ds: xr.Dataset) -> str:
    """The first and last year of the record, ``"1971–2020"`` (months as well for a short record)."""
    time = time_axis(ds)
    first, last = str(time.values[0])[:10], str(time.values[-1])[:10]
    years = time.dt.year.values
    if years[-1] - years[0] >= 2:
        return f"{years[0]}\u2013{years[-1]}"
    return f"{first[:7]} to {last[:7]}"


def context_text(ds: xr.Dataset) -> str:
    """One line for a title: field, level, season and period."""
    parts = [field_text(ds), level_text(ds), steps_text(ds), period_text(ds)]
    return ", ".join(p for p in parts if p)


def duration_text(seconds: float | None) -> str:
    """``75.2 -> "1 min 15 s"``."""
    if seconds is None or not np.isfinite(seconds):
        return "not recorded"
    if seconds < 60:
        return f"{seconds:.1f} s"
    minutes, rest = divmod(round(seconds), 60)
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes} min" if hours else f"{minutes} min {rest} s"


# --- run.log and climodes show


def run_log(headline: str, table: list[str], where: list[str], notes: list[str], config: str) -> str:
    """The text of ``run.log``: the summary, where and how it was solved (``where``: the solver's
    choice, the compute session, what each pass moved), the notes and the resolved config."""
    return "\n".join([headline, *table, *where, *(f"note: {n}" for n in notes), "", "resolved config:", config])


def _range(values: np.ndarray) -> str:
    if values.ndim == 1:
        return f"{values[0]:g} to {values[-1]:g}"
    return f"{np.nanmin(values):g} to {np.nanmax(values):g} (2-D)"


def domain_text(ds: xr.Dataset) -> str:
    """The grid's extent: ``lat 77.5 to -77.5 (32 rows), lon 2.5 to 357.5 (72 columns)``."""
    _, rows, columns = ds["eof"].dims
    lat, lon = map_coordinates(ds)
    return (f"lat {_range(ds[lat].values)} ({ds.sizes[rows]} rows), "
            f"lon {_range(ds[lon].values)} ({ds.sizes[columns]} columns)")


def _wrapped(label: str, text: str, width: int = 100) -> list[str]:
    """``label`` and ``text`` as summary lines no wider than ``width``, the text's own lines kept."""
    return textwrap.wrap(text, width=width, initial_indent=f"  {label:<11} ", subsequent_indent=" " * 14,
                         break_on_hyphens=False) or [f"  {label}"]


def summary(path: str | Path) -> str:
    """The summary text of a results folder or ``modes.nc`` (``climodes show``), lines of 100 characters
    at most but for paths and the table."""
    ds = open_results(path)
    attrs = ds.attrs
    units = ds["eof"].attrs.get("units", "?")
    times = time_axis(ds).values
    lines = [
        f"{Path(path)}",
        f"  made by     {attrs.get('source', '?')} on {attrs.get('date_created', '?')}",
        f"  field       {field_text(ds)} [{units}]",
        f"  domain      {domain_text(ds)}",
        *_wrapped("points", attrs.get("climodes_points", "?")),
        f"  period      {str(times[0])[:10]} to {str(times[-1])[:10]}, {times.size} steps ({steps_text(ds)})",
        *_wrapped("method", attrs.get("climodes_method", "?")),
        *(f"  {line}" for line in variance_table(ds)),
    ]
    notes = attrs.get("climodes_notes", "none")
    for i, line in enumerate(notes.splitlines() or ["none"]):
        lines.append(f"  {'notes' if i == 0 else '':<11} {line}")
    files = attrs.get("climodes_input_files", "").splitlines()
    lines.append(f"  inputs      {inputs_count([f.split(' size=')[0] for f in files])}"
                 + (f", first {files[0]}" if files else ""))
    lines.append(f"  config      sha256 {attrs.get('climodes_config_sha256', '?')[:16]}...")
    lines.append(f"  rerun       {attrs.get('history', '?').split(': ', 1)[-1]}")
    return "\n".join(lines)


# --- what project, reconstruct and table say


def modes_text(which: list[int]) -> str:
    """Mode numbers as a person writes them: ``[1, 2, 3, 5] -> "1-3, 5"``."""
    runs: list[list[int]] = []
    for number in which:
        if runs and number == runs[-1][-1] + 1:
            runs[-1].append(number)
        else:
            runs.append([number])
    return ", ".join(f"{r[0]}-{r[-1]}" if len(r) > 2 else ", ".join(map(str, r)) for r in runs)


def ignored_sections_note(config: Path, given: tuple[str, ...], results: Path) -> list[str]:
    """Why a projection config's ``prepare`` and ``modes`` sections change nothing, if it has any."""
    ignored = [name for name in ("prepare", "modes") if name in given]
    if not ignored:
        return []
    noun, verb = ("sections", "are") if len(ignored) > 1 else ("section", "is")
    return [f"the {' and '.join(ignored)} {noun} of {config} {verb} not used: the modes and the preparation fitted "
            f"in {results} apply to the field"]


def inputs_count(paths: list[str]) -> str:
    """How many inputs ``paths`` name, in words: ``4 file(s)``, ``1 Zarr store(s)``, or both joined (a Zarr
    store is a folder of many files, counted as one store)."""
    stores = sum(str(p).rstrip("/").endswith(".zarr") for p in paths)
    files = len(paths) - stores
    counted = ([f"{files} file(s)"] if files or not stores else []) + ([f"{stores} Zarr store(s)"] if stores else [])
    return " and ".join(counted)


def projection_plan_lines(variable: str, files: list, times: np.ndarray, grid: str, count: int, results: Path,
                          steps: str, blocks: str, where: str) -> list[str]:
    """What ``climodes project --check`` says a projection would read, do and write."""
    return [
        f"reads    {variable} from {inputs_count([f.path for f in files])}, first {files[0].path}",
        f"steps    {times.size}, {str(times[0])[:10]} to {str(times[-1])[:10]}",
        f"grid     {grid} points, the grid of the modes",
        f"projects onto the {count} modes of {results}, prepared as there ({steps})",
        f"blocks   {blocks}",
        f"writes   {where}",
    ]


def projection_table(projection: xr.Dataset) -> list[str]:
    """The projection's summary, one row per mode: the pseudo-PC's mean and standard deviation (a training
    PC has 0 and 1), the median size of the steps' congruence with the mode's pattern, and the median
    fraction of a step's variance that modes 1..k leave unexplained."""
    lines = ["mode  pseudo-PC mean    std  |congruence|  unexplained by modes 1..k",
             " " * 33 + "(median)  (median)"]
    for k, mode in enumerate(projection["mode"].values):
        pc = projection["pc"].values[k]
        lines.append(f"{int(mode):>4}  {np.nanmean(pc):>14.2f}  {np.nanstd(pc, ddof=1):>5.2f}  "
                     f"{np.nanmedian(np.abs(projection['congruence'].values[k])):>12.2f}  "
                     f"{np.nanmedian(projection['unexplained_fraction'].values[k]):>8.2f}")
    return lines


def projection_headline(variable: str, files: list[str], steps: int, count: int, results: Path, out: Path) -> str:
    return (f"climodes: projected {variable} from {inputs_count(files)}, {steps} time steps, onto the {count} modes of "
            f"{results} -> {out}")


def reconstruction_line(ds: xr.Dataset, modes: str, anomalies: bool, out: Path) -> str:
    """What ``climodes reconstruct`` says it wrote."""
    name = next(iter(ds.data_vars))
    var = ds[name]
    what = "anomalies" if anomalies else "values"
    units = var.attrs.get("units")
    return (f"climodes: wrote {name} rebuilt from modes {modes} ({what}{f', {units}' if units else ''}), "
            f"{var.shape[0]} time steps x {var.shape[1]} x {var.shape[2]} points, to {out}")


def table_comment(results: Path, ds: xr.Dataset) -> str:
    """The first line of a CSV coefficient table: who wrote it, from what, and what its columns hold."""
    units = units_text(ds["step_variance"].attrs.get("units")) if "step_variance" in ds else ""
    return (f"climodes {__version__}: the PCs of {field_text(ds)} from "
            f"{results}; pc_k: standardised PC of mode k; unexplained_fraction_k: fraction of the step's weighted "
            f"variance modes 1..k leave unexplained; step_variance: the step's share of the total variance"
            f"{f' ({units})' if units else ''}")


def table_line(frame, out: Path) -> str:
    """What ``climodes table`` says it wrote."""
    return f"climodes: wrote {len(frame)} rows (one per time step) x {len(frame.columns)} columns to {out}"


# --- report.html


@dataclass(frozen=True)
class Picture:
    """A drawn figure as the report embeds it."""

    name: str  # file stem, e.g. "mode_01"
    section: str  # heading it is shown under
    caption: str
    media_type: str  # "image/png" or "image/svg+xml"
    data: bytes


REPORT_FILE = "report.html"
TABLE_HEAD = "#2e5e4e"  # the modes table's heading colour (the report's tests look for it on screen)

_STYLE = f"""
body {{ margin: 0; font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; color: #1d2421;
       background: #f4f2ec; line-height: 1.45; }}
header {{ background: #1f3a32; color: #f4f2ec; padding: 22px 36px 18px; }}
header h1 {{ margin: 0 0 4px; font-size: 24px; font-weight: 600; }}
header p {{ margin: 0; opacity: 0.85; }}
main {{ max-width: 1180px; margin: 0 auto; padding: 8px 36px 48px; }}
h2 {{ font-size: 18px; margin: 30px 0 10px; padding-bottom: 4px; border-bottom: 2px solid #c9c2b0; }}
dl.facts {{ display: grid; grid-template-columns: 11em 1fr; gap: 4px 18px; margin: 16px 0; }}
dl.facts dt {{ font-weight: 600; color: #4c5a53; }}
dl.facts dd {{ margin: 0; overflow-wrap: anywhere; }}
table.modes {{ border-collapse: collapse; background: #fffdf8; font-variant-numeric: tabular-nums; }}
table.modes th {{ background: {TABLE_HEAD}; color: #fff; padding: 7px 14px; text-align: right; font-weight: 600; }}
table.modes td {{ padding: 5px 14px; text-align: right; border-bottom: 1px solid #e4dfd2; }}
table.modes td.flag, table.modes th.flag {{ text-align: left; }}
table.modes td.flag {{ color: #8a4b08; }}
table.modes tr.careful td {{ background: #fbf0dc; }}
figure {{ margin: 14px 0 26px; background: #fff; padding: 10px; border: 1px solid #ddd6c6; }}
figure img {{ display: block; width: 100%; height: auto; margin: 0 auto; }}
figcaption {{ font-size: 14px; color: #4c5a53; margin-top: 6px; }}
ul.notes li {{ margin: 3px 0; }}
pre {{ background: #fffdf8; border: 1px solid #ddd6c6; padding: 12px; overflow-x: auto; font-size: 13px; }}
details summary {{ cursor: pointer; color: #2e5e4e; }}
"""


def _setting(key: str, value) -> str:
    """A config value in words: ``lat [-80.0, 80.0] -> "lat -80 to 80"``, ``months [12, 1, 2] -> "months DJF"``."""
    if key == "months":
        return months_text(value)
    if isinstance(value, list) and len(value) == 2:
        return f"{key} {value[0]:g} to {value[1]:g}" if all(isinstance(v, float) for v in value) else \
            f"{key} {value[0]} to {value[1]}"
    if isinstance(value, bool):
        return key if value else f"no {key}"
    return f"{key} {value}"


def _facts(ds: xr.Dataset) -> list[tuple[str, str]]:
    attrs = ds.attrs
    config = stored_config(ds)
    chosen = {k: v for k, v in (config.get("select") or {}).items() if v is not None}
    prepare = config.get("prepare") or {}
    times = time_axis(ds).values
    files = attrs.get("climodes_input_files", "").splitlines()
    seconds = attrs.get("climodes_elapsed_seconds")
    return [
        ("field", f"{field_text(ds)} [{units_text(ds['eof'].attrs.get('units')) or 'no units'}]"),
        ("inputs", inputs_count([f.split(" size=")[0] for f in files]) + (f": {files[0].split(' size=')[0]}" + (" ..." if len(files) > 1 else "")
                                            if files else "")),
        ("selection", ", ".join(_setting(k, v) for k, v in chosen.items()) or "the whole field"),
        ("domain", domain_text(ds)),
        ("period", f"{str(times[0])[:10]} to {str(times[-1])[:10]}, {times.size} steps ({steps_text(ds)})"),
        ("preparation", ", ".join(_setting(k, v) for k, v in prepare.items() if v is not None)),
        ("points", attrs.get("climodes_points", "not recorded")),
        ("method", attrs.get("climodes_method", "not recorded")),
        ("time taken", duration_text(None if seconds is None else float(seconds))),
        ("where it ran", attrs.get("climodes_compute", "not recorded")),
        ("made by", f"{attrs.get('source', '?')} on {attrs.get('date_created', '?')}"),
        ("to run it again", attrs.get("history", "?").split(": ", 1)[-1]),
    ]


def _modes_table(ds: xr.Dataset) -> str:
    rows = mode_rows(ds)
    units = units_text(ds["eigenvalue"].attrs.get("units"))
    sized, tested = rows[0].sample_size is not None, rows[0].significant is not None
    level = float(ds["noise_eigenvalue"].attrs.get("level", np.nan)) if tested else np.nan
    heads = (["mode", "variance explained", f"eigenvalue{f' ({units})' if units else ''}"] + ["effective N"] * sized
             + ["separated (North)"] + [f"red noise {100 * level:g}%", "significant"] * tested + ["read with care"])
    out = ["<table class=\"modes\">", "<tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in heads[:-1])
           + f"<th class=\"flag\">{heads[-1]}</th></tr>"]
    for k, row in enumerate(rows):
        cells = ([str(row.mode), row.variance(), f"{float(ds['eigenvalue'][k]):.4g}"] + [row.sample_size] * sized
                 + ["yes" if row.separated else "no, mixed"] + [row.noise, "yes" if row.significant else "no"] * tested)
        flag = "; ".join(row.flags)
        opening = "<tr class=\"careful\">" if flag else "<tr>"
        out.append(opening + "".join(f"<td>{html.escape(c)}</td>" for c in cells)
                   + f"<td class=\"flag\">{html.escape(flag)}</td></tr>")
    out.append("</table>")
    return "\n".join(out)


def _figure(picture: Picture) -> str:
    source = f"data:{picture.media_type};base64,{base64.b64encode(picture.data).decode('ascii')}"
    return (f"<figure id=\"{html.escape(picture.name)}\"><img alt=\"{html.escape(picture.caption)}\" "
            f"src=\"{source}\"><figcaption>{html.escape(picture.caption)}</figcaption></figure>")


def report_html(ds: xr.Dataset, pictures: list[Picture]) -> str:
    """The whole report as one self-contained HTML page (images embedded, nothing fetched from elsewhere)."""
    parts = [
        "<!DOCTYPE html>",
        "<html lang=\"en\"><head><meta charset=\"utf-8\">",
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">",
        f"<title>climodes: {html.escape(field_text(ds))}</title>",
        f"<style>{_STYLE}</style></head><body>",
        f"<header><h1>Modes of variability of {html.escape(field_text(ds))}</h1>",
        f"<p>{html.escape(', '.join(p for p in (level_text(ds), steps_text(ds), period_text(ds)) if p))}; "
        f"{ds.sizes['mode']} modes</p></header><main>",
        "<h2>Run</h2><dl class=\"facts\">",
        *(f"<dt>{html.escape(k)}</dt><dd>{html.escape(str(v))}</dd>" for k, v in _facts(ds)),
        "</dl>",
        "<h2>Modes</h2>",
        _modes_table(ds),
    ]
    section = None
    for picture in pictures:
        if picture.section != section:
            section = picture.section
            parts.append(f"<h2>{html.escape(section)}</h2>")
        parts.append(_figure(picture))
    if not pictures:
        parts.append("<p>No figures were drawn (output.figures: false); <code>climodes figures</code> draws them.</p>")
    notes = ds.attrs.get("climodes_notes", "none").splitlines()
    parts += ["<h2>Notes</h2><ul class=\"notes\">", *(f"<li>{html.escape(n)}</li>" for n in notes), "</ul>"]
    files = ds.attrs.get("climodes_input_files", "")
    parts += ["<h2>Input files</h2>", f"<pre>{html.escape(files or 'not recorded')}</pre>",
              "<h2>Resolved config</h2>", f"<pre>{html.escape(ds.attrs.get('climodes_config', 'not recorded'))}</pre>",
              f"<p><small>drawn from modes.nc by {html.escape(ds.attrs.get('source', 'climodes'))}</small></p>",
              "</main></body></html>"]
    return "\n".join(parts)
