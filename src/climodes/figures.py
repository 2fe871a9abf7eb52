"""Figures of a results dataset, drawn from ``modes.nc`` alone.

Per mode: its map (regression on the PC, with the correlation map beside it
when the file has one) and a sheet of its PC (the series as a line with a
running mean, box plots by calendar month and by decade).  For the run: the
leading PCs against each other with density shading, the variance spectrum,
the residuals when the file has them, and the rotated modes when rotation ran.

Nothing here depends on the time of drawing, so the same ``modes.nc`` and
options give the same files, byte for byte (``climodes figures`` redraws
what the run drew).

Example
-------
>>> from climodes.config import FigureOptions                      # doctest: +SKIP
>>> from climodes.results import open_results                      # doctest: +SKIP
>>> draw_all(open_results("results/demo"), FigureOptions(), Path("/tmp/figs"))   # doctest: +SKIP
"""

from __future__ import annotations

import contextlib
import io
import os
import re
import secrets
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402  (the backend must be chosen first)
import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from climodes import __version__  # noqa: E402
from climodes.config import FIGURE_FORMATS, FigureOptions  # noqa: E402
from climodes.errors import UserError  # noqa: E402
from climodes.maps import (  # noqa: E402
    DIVERGING,
    SEQUENTIAL,
    domain_of,
    draw_map,
    grid_points,
    projection_for,
    symmetric_levels,
    unused_legend,
)
from climodes.report import (  # noqa: E402
    Picture,
    context_text,
    mode_rows,
    percent,
    stored_config,
    time_axis,
    units_text,
)

RAW = "#2c5d63"  # the PC itself
SMOOTH = "#e3872d"  # its running mean
BAND = "#efeadf"  # one standard deviation either side of zero
BOX = "#d5e6df"  # the boxes of the box plots
CAREFUL = "#b86e00"  # the mark of a mode to read with care
NOISE = "#7b3f98"  # the red-noise threshold
_FORMATS = {"png": "image/png", "svg": "image/svg+xml"}
# the density of the mode pairs: a sequential map whose lightest shade (one step) still shows on white
_DENSITY = matplotlib.colors.ListedColormap(matplotlib.colormaps["PuBuGn"](np.linspace(0.22, 1, 256)))
_RC = {"svg.hashsalt": "climodes", "font.size": 9, "axes.titlesize": 9, "axes.labelsize": 9,
       "axes.spines.top": False, "axes.spines.right": False}


@dataclass
class Page:
    """One figure before it is saved."""

    name: str
    section: str
    caption: str
    figure: Figure


# --- time


def decimal_years(time: xr.DataArray) -> np.ndarray:
    """Dates of any CF calendar as decimal years (a step's day of its year over the year's length)."""
    days = time.dt.days_in_year.values if hasattr(time.dt, "days_in_year") else 365.25
    return time.dt.year.values + (time.dt.dayofyear.values - 1 + time.dt.hour.values / 24) / days


def running_mean(values: np.ndarray, window: int) -> np.ndarray:
    """Centred running mean over ``window`` (odd) steps; NaN where the window runs off either end."""
    out = np.full(values.shape, np.nan)
    if window > values.size:
        return out
    sums = np.cumsum(np.insert(values.astype(float), 0, 0.0))
    half = window // 2
    out[half: values.size - half] = (sums[window:] - sums[:-window]) / window
    return out


def smoothing(steps_per_year: float, count: int) -> tuple[int, str] | None:
    """The running-mean window for a series, and its name; None for a series short enough to read as it is.

    Daily series get a 91-day (one season) mean, monthly series of ten years or
    more a 13-month mean (the odd window nearest a year, centred on its step),
    yearly series of 40 years or more a 5-year mean.
    """
    if steps_per_year >= 300:
        window, unit = 91, "day"
    elif steps_per_year >= 40:
        window, unit = 2 * round(steps_per_year / 8) + 1, "step"
    elif steps_per_year >= 6:
        window, unit = 2 * round(steps_per_year / 2) + 1, "month" if 11 <= steps_per_year <= 13 else "step"
        if count < 10 * steps_per_year:
            return None
    else:
        window, unit = 5, "year" if steps_per_year <= 1.05 else "step"
        if count < 40:
            return None
    return (window, f"{window}-{unit} running mean") if count >= 2 * window else None


def _with_gaps(x: np.ndarray, *ys: np.ndarray) -> list[np.ndarray]:
    """Break the lines where the record has a gap (a step more than 1.5 times the usual one)."""
    if x.size < 3:
        return [x, *ys]
    step = np.median(np.diff(x))
    cut = np.flatnonzero(np.diff(x) > 1.5 * step) + 1
    return [np.insert(x.astype(float), cut, np.nan)] + [np.insert(y.astype(float), cut, np.nan) for y in ys]


# --- pages


def _header(fig: Figure, title: str, context: str, flags: list[str], height: float) -> None:
    """The title block above the panels: title, what the field is, and the marks of a mode to read with care."""
    top = 1 - 0.12 / height
    fig.text(0.012, top, title, fontsize=12, fontweight="bold", va="top", ha="left")
    fig.text(0.012, top - 0.24 / height, context, fontsize=8.5, color="#4c5a53", va="top", ha="left")
    for i, flag in enumerate(flags):
        fig.text(0.988, top - i * 0.22 / height, flag, fontsize=8, color="white", va="top", ha="right",
                 fontweight="bold", bbox={"boxstyle": "round,pad=0.3", "facecolor": CAREFUL, "edgecolor": "none"})
    fig.get_layout_engine().set(rect=(0, 0, 1, 1 - 0.8 / height))


def _mark(ax) -> None:
    """Draw a map's frame dashed in the warning colour."""
    spine = ax.spines["geo"]
    spine.set_edgecolor(CAREFUL)
    spine.set_linewidth(2.0)
    spine.set_linestyle((0, (4, 2)))


def _map_page(ds: xr.Dataset, panels: list[tuple[str, np.ndarray, np.ndarray, str, str]], title: str,
              flags: list[str], variable: str) -> Figure:
    """A figure of one or two maps side by side, each with its colour bar and legend of unused points.

    ``panels`` holds (panel title, values, levels, colour map, colour-bar label).
    """
    lons, lats = grid_points(ds, variable)
    domain = domain_of(lons, lats)
    projection, kind = projection_for(domain)
    width = 7.4 if len(panels) == 1 else 12.0
    fig = plt.figure(figsize=(width, 5.0), layout="constrained")
    axes = [fig.add_subplot(1, len(panels), i + 1, projection=projection) for i in range(len(panels))]
    for ax, (name, values, levels, cmap, label) in zip(axes, panels):
        mesh = draw_map(ax, ds, values, levels, cmap, domain, kind, variable)
        ax.set_title(name, loc="left", fontsize=9)
        ticks = levels if len(levels) <= 13 else levels[::2]
        bar = fig.colorbar(mesh, ax=ax, orientation="horizontal", fraction=0.046, pad=0.07, aspect=38,
                           ticks=ticks, drawedges=True)
        bar.set_label(label, fontsize=8)
        bar.ax.tick_params(labelsize=7)
        bar.dividers.set_linewidth(0.3)
        if flags:
            _mark(ax)
    unused_legend(fig, ds, panels[0][1])
    x0, x1 = axes[0].get_xlim()
    y0, y1 = axes[0].get_ylim()
    aspect = (y1 - y0) / (x1 - x0)
    height = float(np.clip((width - 0.5) / len(panels) * aspect + 2.0, 3.6, 9.5))
    fig.set_size_inches(width, height)
    _header(fig, title, context_text(ds), flags, height)
    return fig


def _per_pc(maps: xr.DataArray, pc: str) -> str:
    """The colour-bar label of a regression map: the field's units per standard deviation of the PC."""
    units = units_text(maps.attrs.get("units"))
    if units == "1":  # a standardised field
        return f"standard deviations of the field per standard deviation of {pc}"
    return f"{units or 'field units'} per standard deviation of {pc}"


def mode_map(ds: xr.Dataset, k: int) -> Figure:
    """Mode ``k`` (0-based) as a map: its regression pattern, and its correlation map beside it when present."""
    row = mode_rows(ds)[k]
    values = ds["eof"].isel(mode=k).values
    panels = [(f"regression on PC {row.mode}", values, symmetric_levels(values), DIVERGING,
               _per_pc(ds["eof"], f"PC {row.mode}"))]
    if "correlation" in ds:
        panels.append((f"correlation with PC {row.mode}", ds["correlation"].isel(mode=k).values,
                       np.round(np.arange(-1, 1.01, 0.2), 1), DIVERGING,
                       f"correlation of PC {row.mode} with the prepared field"))
    return _map_page(ds, panels, f"Mode {row.mode}: {row.variance()} of the variance", row.flags, "eof")


def rotated_map(ds: xr.Dataset, k: int) -> Figure:
    """Rotated mode ``k`` (0-based) as a map."""
    number = int(ds["mode"].values[k])
    values = ds["rotated_eof"].isel(mode=k).values
    share = (f": {percent(float(ds['rotated_variance_explained'][k]))} of the variance"
             if "rotated_variance_explained" in ds else "")
    panels = [(f"rotated pattern {number}", values, symmetric_levels(values), DIVERGING,
               _per_pc(ds["rotated_eof"], f"rotated PC {number}"))]
    return _map_page(ds, panels, f"Rotated mode {number}{share}", [], "rotated_eof")


def _month_groups(ds: xr.Dataset, values: np.ndarray) -> tuple[list[np.ndarray], list[str]]:
    config = stored_config(ds)
    if (config.get("prepare") or {}).get("aggregate", "none") != "none":
        return [], []
    months = time_axis(ds).dt.month.values
    order = (config.get("select") or {}).get("months") or sorted(set(months.tolist()))
    groups = [values[months == m] for m in order if (months == m).any()]
    labels = ["JFMAMJJASOND"[m - 1] for m in order if (months == m).any()]
    return (groups, labels) if len(groups) >= 2 else ([], [])


def _period_groups(years: np.ndarray, values: np.ndarray) -> tuple[list[np.ndarray], list[str], str]:
    span = years.max() - years.min() + 1
    keys = years // 10 * 10 if span >= 20 else years
    unique = np.unique(keys)
    labels = [f"{k}s" for k in unique] if span >= 20 else [str(k) for k in unique]
    return [values[keys == k] for k in unique], labels, "decade" if span >= 20 else "year"


def _boxes(ax, groups: list[np.ndarray], labels: list[str], xlabel: str) -> None:
    ax.axhline(0, color="0.55", linewidth=0.6, zorder=0)
    ax.boxplot(groups, tick_labels=labels, widths=0.62, patch_artist=True, whis=(5, 95),
               boxprops={"facecolor": BOX, "edgecolor": RAW, "linewidth": 0.8},
               medianprops={"color": SMOOTH, "linewidth": 2.0},
               whiskerprops={"color": RAW, "linewidth": 0.8}, capprops={"color": RAW, "linewidth": 0.8},
               flierprops={"marker": "o", "markersize": 2.2, "markerfacecolor": RAW, "markeredgecolor": "none",
                           "alpha": 0.6})
    ax.set_xlabel(xlabel)
    if len(labels) > 12:
        ax.tick_params(axis="x", labelrotation=90, labelsize=6.5)


def pc_sheet(ds: xr.Dataset, k: int) -> Figure:
    """PC ``k`` (0-based): the series with its running mean, and its spread by calendar month and by decade."""
    row = mode_rows(ds)[k]
    values = ds["pc"].isel(mode=k).values.astype(float)
    time = time_axis(ds)
    x = decimal_years(time)
    months, month_labels = _month_groups(ds, values)
    fig = plt.figure(figsize=(8.6, 5.6), layout="constrained")
    grid = fig.add_gridspec(2, 2 if months else 1, height_ratios=[1.25, 1], width_ratios=[1, 1.4] if months else [1])
    series = fig.add_subplot(grid[0, :])
    series.axhspan(-1, 1, color=BAND, zorder=0, linewidth=0)
    series.axhline(0, color="0.45", linewidth=0.6, zorder=1)
    line_x, line_y = _with_gaps(x, values)
    thin = values.size > 1500
    series.plot(line_x, line_y, color=RAW, linewidth=0.5 if thin else 0.9, alpha=0.75 if thin else 1.0,
                marker="o" if values.size <= 80 else None, markersize=2.5, label=f"PC {row.mode}", zorder=2)
    per_year = 365.25 / max(np.median(np.diff(x)) * 365.25, 1e-9) if x.size > 1 else 1.0
    smooth = smoothing(per_year, values.size)
    if smooth:
        window, name = smooth
        sx, sy = _with_gaps(x, running_mean(values, window))
        series.plot(sx, sy, color=SMOOTH, linewidth=2.0, label=name, zorder=3)
    series.set_xlim(x.min() - 0.01 * np.ptp(x), x.max() + 0.01 * np.ptp(x))
    series.set_ylabel("standard deviations")
    series.legend(loc="lower right", bbox_to_anchor=(1.0, 1.0), ncols=2, frameon=False, fontsize=8,
                  borderaxespad=0.1)
    series.set_title("the series; shaded: within one standard deviation", loc="left", fontsize=8, color="#4c5a53")
    if months:
        _boxes(fig.add_subplot(grid[1, 0], sharey=series), months, month_labels, "calendar month")
    groups, labels, unit = _period_groups(time.dt.year.values, values)
    spread = fig.add_subplot(grid[1, -1], sharey=series)
    _boxes(spread, groups, labels, unit)
    height = 5.6
    _header(fig, f"PC {row.mode}: {row.variance()} of the variance", context_text(ds), row.flags, height)
    if row.flags:
        for spine in series.spines.values():
            spine.set_edgecolor(CAREFUL)
            spine.set_linewidth(1.6)
    return fig


def leading_pairs(count: int, most: int = 3) -> list[tuple[int, int]]:
    """The neighbouring pairs (0-based) among the leading modes, where mixing shows: (1,2), (2,3), (3,4)."""
    return [(i, i + 1) for i in range(min(count - 1, most))]


def pairs_figure(ds: xr.Dataset) -> Figure:
    """The leading PCs against each other, shaded by how many steps fall in each hexagon."""
    pairs = leading_pairs(ds.sizes["mode"])
    rows = mode_rows(ds)
    pcs = ds["pc"].values.astype(float)
    steps = pcs.shape[1]
    limit = float(np.ceil(np.nanmax(np.abs(pcs[: pairs[-1][1] + 1])) * 2) / 2)
    fig = plt.figure(figsize=(3.3 * len(pairs) + 1.0, 4.3), layout="constrained")
    axes = [fig.add_subplot(1, len(pairs), i + 1) for i in range(len(pairs))]
    size = int(np.clip(np.sqrt(steps) / 1.6, 8, 40))
    theta = np.linspace(0, 2 * np.pi, 200)
    cells = None
    for ax, (i, j) in zip(axes, pairs):
        cells = ax.hexbin(pcs[i], pcs[j], gridsize=size, extent=(-limit, limit, -limit, limit), mincnt=1,
                          cmap=_DENSITY, bins="log" if steps > 2000 else None, linewidths=0.2,
                          edgecolors="face", rasterized=True)
        for radius in (1, 2):
            ax.plot(radius * np.cos(theta), radius * np.sin(theta), color="0.2", linewidth=0.7,
                    linestyle=(0, (2, 2)), zorder=3)
        ax.axhline(0, color="0.7", linewidth=0.5, zorder=0)
        ax.axvline(0, color="0.7", linewidth=0.5, zorder=0)
        ax.set_xlim(-limit, limit)
        ax.set_ylim(-limit, limit)
        ax.set_aspect("equal")
        ax.set_xlabel(f"PC {rows[i].mode}")
        ax.set_ylabel(f"PC {rows[j].mode}")
        unclear = [f"PC {row.mode}" for row in (rows[i], rows[j]) if not row.separated]
        ax.set_title(f"PC {rows[i].mode} and PC {rows[j].mode}"
                     + (f" ({' and '.join(unclear)} not separated)" if unclear else ""),
                     loc="left", color=CAREFUL if unclear else "black")
    bar = fig.colorbar(cells, ax=axes, shrink=0.8, aspect=30)
    bar.set_label("time steps per hexagon" + (" (log scale)" if steps > 2000 else ""))
    _header(fig, "Leading PCs against each other", context_text(ds) + "; dashed circles: 1 and 2 standard deviations",
            [], 4.3)
    return fig


def spectrum_figure(ds: xr.Dataset) -> Figure:
    """Variance explained per mode with its sampling error, the cumulative share, the whole spectrum and noise."""
    rows = mode_rows(ds)
    modes = ds["mode"].values
    share = 100 * ds["variance_explained"].values
    error = 100 * ds["variance_explained_error"].values
    apart = np.array([r.separated for r in rows])
    total = float(ds["eigenvalue"].values[0] / ds["variance_explained"].values[0])
    noise = 100 * ds["noise_eigenvalue"].values / total if "noise_eigenvalue" in ds else None
    whole = "spectrum_explained" in ds
    fig = plt.figure(figsize=(10.5 if whole else 6.8, 4.4), layout="constrained")
    ax = fig.add_subplot(1, 2 if whole else 1, 1)
    ax.errorbar(modes, share, yerr=error, fmt="none", ecolor="0.25", elinewidth=1, capsize=3, zorder=2)
    if apart.any():
        ax.plot(modes[apart], share[apart], "o", color=RAW, markersize=6, label="separated (North's rule)", zorder=3)
    if not apart.all():
        ax.plot(modes[~apart], share[~apart], "o", markerfacecolor="white", markeredgecolor=CAREFUL,
                markeredgewidth=1.5, markersize=6, label="not separated: mixed", zorder=3, linestyle="none")
    if noise is not None:
        ax.step(modes, noise, where="mid", color=NOISE, linestyle="--", linewidth=1.2, label="red-noise threshold")
        weak = np.array([r.significant is False for r in rows])
        if weak.any():
            ax.plot(modes[weak], share[weak], "x", color=NOISE, markersize=9, label="not significant", zorder=4)
    ax.set_xticks(modes)
    ax.set_xlabel("mode")
    ax.set_ylabel("variance explained (%)")
    ax.set_ylim(0, max(share + error) * 1.15)
    ax.set_title("kept modes, with North et al. (1982) sampling errors", loc="left")
    cumulative = ax.twinx()
    cumulative.spines["right"].set_visible(True)
    cumulative.plot(modes, np.cumsum(share), color=SMOOTH, linewidth=1.6, marker="s", markersize=3,
                    label="cumulative (right axis)")
    cumulative.set_ylim(0, 100)
    cumulative.set_ylabel("cumulative variance explained (%)", color=SMOOTH)
    handles = ax.get_legend_handles_labels()
    extra = cumulative.get_legend_handles_labels()
    ax.legend(handles[0] + extra[0], handles[1] + extra[1], fontsize=7.5, frameon=False, loc="upper center",
              bbox_to_anchor=(0.5, -0.16), ncols=3)
    if whole:
        every = ds["spectrum_explained"]
        ranks = ds[every.dims[0]].values if every.dims[0] in ds.coords else np.arange(1, every.size + 1)
        right = fig.add_subplot(1, 2, 2)
        values = 100 * every.values.astype(float)
        resolved = values > 1e-9 * values.max()  # the rest are zero but for rounding (a centred field's last rank)
        right.plot(ranks[resolved], values[resolved], color="0.45", linewidth=0.8, marker="o", markersize=2.2,
                   label="every rank")
        kept = resolved & (ranks <= modes.max())
        right.plot(ranks[kept], values[kept], "o", color=RAW, markersize=5, label="kept")
        if noise is not None:
            right.step(modes, noise, where="mid", color=NOISE, linestyle="--", linewidth=1.2,
                       label="red-noise threshold")
        right.set_yscale("log")
        right.set_xscale("log" if ranks.size > 60 else "linear")
        right.set_xlabel("rank")
        right.set_ylabel("variance explained (%)")
        unresolved = float(every.attrs.get("unresolved_fraction", 0) or 0)
        right.set_title("the whole spectrum" + (f"; {percent(unresolved)} unresolved" if unresolved > 0 else ""),
                        loc="left")
        right.legend(fontsize=7.5, frameon=False, loc="upper center", bbox_to_anchor=(0.5, -0.16), ncols=3)
    _header(fig, "Variance explained", context_text(ds), [], 4.4)
    return fig


def residuals_figure(ds: xr.Dataset, local_modes: int | None) -> Figure:
    """How much of each step's variance modes 1..k leave unexplained, and where modes 1..k explain the field."""
    count = ds.sizes["mode"]
    k = min(local_modes or count, count)
    lons, lats = grid_points(ds, "explained_locally")
    domain = domain_of(lons, lats)
    projection, kind = projection_for(domain)
    fig = plt.figure(figsize=(11.5, 4.8), layout="constrained")
    grid = fig.add_gridspec(1, 2, width_ratios=[1, 1.5])
    curves = fig.add_subplot(grid[0, 0])
    colours = matplotlib.colormaps["viridis"].resampled(max(count, 2))
    for m in range(count):
        values = np.sort(ds["unexplained_fraction"].isel(mode=m).values.astype(float))
        values = values[np.isfinite(values)]
        ecdf = np.arange(1, values.size + 1) / values.size
        curves.step(values, ecdf, where="post", color=colours(m), linewidth=1.4 if m + 1 == k else 0.9,
                    label=f"modes 1..{m + 1}" if m < 8 or m + 1 == count else None)
    curves.set_xlim(0, 1)
    curves.set_ylim(0, 1)
    curves.set_xlabel("fraction of a step's variance left unexplained")
    curves.set_ylabel("fraction of time steps at or below")
    curves.set_title("unexplained fraction over the time steps", loc="left")
    curves.legend(fontsize=7, frameon=False, loc="lower right")
    curves.grid(color="0.88", linewidth=0.5)
    ax = fig.add_subplot(grid[0, 1], projection=projection)
    values = ds["explained_locally"].isel(mode=k - 1).values
    levels = np.round(np.linspace(0, 1, 11), 1)
    mesh = draw_map(ax, ds, values, levels, SEQUENTIAL, domain, kind, "explained_locally")
    ax.set_title(f"local variance explained by modes 1..{k}", loc="left")
    bar = fig.colorbar(mesh, ax=ax, orientation="horizontal", fraction=0.046, pad=0.07, aspect=38, ticks=levels,
                       drawedges=True)
    bar.set_label(f"fraction of each point's variance explained by modes 1..{k}", fontsize=8)
    bar.ax.tick_params(labelsize=7)
    unused_legend(fig, ds, values)
    _header(fig, "What the modes leave unexplained", context_text(ds), [], 4.8)
    return fig


def pages(ds: xr.Dataset, options: FigureOptions) -> Iterator[Page]:
    """Every figure the options ask for and the file has the variables of, one at a time."""
    count = ds.sizes["mode"]
    rows = mode_rows(ds)
    units = units_text(ds["eof"].attrs.get("units")) or "field units"
    if "maps" in options.draw:
        for k in range(count):
            beside = ", beside its correlation with the prepared field" if "correlation" in ds else ""
            care = f" Read with care: {'; '.join(rows[k].flags)}." if rows[k].flags else ""
            yield Page(f"mode_{rows[k].mode:02d}", "Maps of the modes",
                       f"Mode {rows[k].mode}: regression of the anomaly on the standardised PC ({units} per standard "
                       f"deviation){beside}; {rows[k].variance()} of the variance.{care}", mode_map(ds, k))
        if "rotated_eof" in ds:
            for k in range(count):
                yield Page(f"rotated_{rows[k].mode:02d}", "Rotated modes",
                           f"Rotated mode {rows[k].mode} ({units} per standard deviation of its PC).",
                           rotated_map(ds, k))
    if "series" in options.draw:
        for k in range(count):
            yield Page(f"pc_{rows[k].mode:02d}", "Principal components",
                       f"PC {rows[k].mode}: the standardised series with its running mean, and its spread by calendar "
                       "month and by period (boxes: quartiles; whiskers: 5th to 95th percentiles).",
                       pc_sheet(ds, k))
    if "pairs" in options.draw and count >= 2:
        yield Page("pairs", "Mode pairs", "Neighbouring leading PCs against each other; shading counts the time "
                   "steps in each hexagon. A ring or a smear along a diagonal marks a mixed pair.", pairs_figure(ds))
    if "spectrum" in options.draw:
        yield Page("spectrum", "Variance spectrum", "Variance explained by each kept mode with its sampling error, "
                   "the cumulative share" + (", the whole spectrum" if "spectrum_explained" in ds else "")
                   + (" and the red-noise threshold" if "noise_eigenvalue" in ds else "") + ".", spectrum_figure(ds))
    if "residuals" in options.draw and {"unexplained_fraction", "explained_locally"} <= set(ds.data_vars):
        k = min(options.local_modes or count, count)
        yield Page("residuals", "Residuals", "Distribution over the time steps of the fraction of variance left "
                   f"unexplained by modes 1..k, for each k, and the local variance explained by modes 1..{k}.",
                   residuals_figure(ds, options.local_modes))


def _save(fig: Figure, target: Path | io.BytesIO, kind: str, dpi: int) -> None:
    """Save with metadata that carries no date, so the same results give the same bytes."""
    creator = f"climodes {__version__}"
    metadata = {"png": {"Software": creator}, "svg": {"Date": None, "Creator": creator},
                "pdf": {"CreationDate": None, "ModDate": None, "Creator": creator, "Producer": creator}}[kind]
    fig.savefig(target, format=kind, dpi=dpi, metadata=metadata, facecolor="white")


def draw_all(ds: xr.Dataset, options: FigureOptions, folder: Path) -> list[Picture]:
    """Draw every figure of ``ds`` into ``folder`` (created if needed); return them as the report embeds them.

    PNG and SVG files are embedded as they are; for PDF the report gets a PNG
    of the same figure at the same resolution.
    """
    folder.mkdir(parents=True, exist_ok=True)
    pictures = []
    with plt.rc_context(_RC):
        for page in pages(ds, options):
            path = folder / f"{page.name}.{options.format}"
            _save(page.figure, path, options.format, options.dpi)
            if options.format in _FORMATS:
                data, media = path.read_bytes(), _FORMATS[options.format]
            else:
                buffer = io.BytesIO()
                _save(page.figure, buffer, "png", options.dpi)
                data, media = buffer.getvalue(), "image/png"
            plt.close(page.figure)
            pictures.append(Picture(page.name, page.section, page.caption, media, data))
    return pictures


FIGURES_DIR = "figures"
_OURS = re.compile(rf"^((mode|rotated|pc)_\d+|pairs|spectrum|residuals)\.({'|'.join(FIGURE_FORMATS)})$")


def replace_figures(ds: xr.Dataset, options: FigureOptions, folder: Path) -> tuple[list[Picture], list[Path]]:
    """Draw the figures into ``folder/figures``, replacing the whole folder once every figure is drawn.

    A ``figures`` folder holding anything climodes does not write is left as it is, with an error.
    """
    final = folder / FIGURES_DIR
    _refuse_foreign_figures(final, "")
    stage = folder / f".{FIGURES_DIR}.partial-{secrets.token_hex(4)}"
    os.mkdir(stage)  # with the user's umask, as the folder it becomes
    try:
        pictures = draw_all(ds, options, stage)
        if final.exists():
            _refuse_foreign_figures(final, " while the figures were drawn")
            old = Path(tempfile.mkdtemp(prefix=f".{FIGURES_DIR}.old-", dir=folder))
            os.replace(final, old / FIGURES_DIR)
            os.replace(stage, final)
            for name in os.listdir(old / FIGURES_DIR):  # only climodes' own figures go; anything else stays there
                if _OURS.match(name) and os.path.isfile(old / FIGURES_DIR / name):
                    os.unlink(old / FIGURES_DIR / name)
            with contextlib.suppress(OSError):
                os.rmdir(old / FIGURES_DIR)
                os.rmdir(old)
        else:
            os.replace(stage, final)
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
    return pictures, [final / f"{p.name}.{options.format}" for p in pictures]


def _refuse_foreign_figures(final: Path, when: str) -> None:
    """Refuse to replace a ``figures`` folder that holds anything climodes does not write (or is a file)."""
    if not os.path.lexists(final):
        return
    if final.is_symlink() or not final.is_dir():
        raise UserError(f"{final}: is not a folder climodes wrote; move it out of the way and draw again")
    foreign = [p.name for p in final.iterdir() if not (p.is_file() and not p.is_symlink() and _OURS.match(p.name))]
    if foreign:
        raise UserError(f"{final}: holds {foreign[0]}, which climodes did not write{when}; move it out of the way and "
                        "draw again")
