"""Turn a selected field into the anomalies that are decomposed.

In order: seasonal or annual means, anomalies against a baseline climatology
or mean, a linear trend removed at each point, and standardisation.  The
functions take lazy ``(time, lat, lon)`` DataArrays and return them (or the
steps still to apply); only the time coordinate is looked at in memory.

The steps after the means act on each point's time series alone.
:func:`time_steps` hands them over as :class:`TimeSteps`, plain numpy kernels,
so a solver can apply them where it is cheapest: the anomaly, trend and
centring of a complete series are linear in it, so the streaming solvers
apply them to their small ``(time x modes)`` products instead of to every
block of the field in every pass.
"""

from __future__ import annotations

import datetime as dt
import warnings
from dataclasses import dataclass
from typing import Callable

import numpy as np
import xarray as xr

from climodes.config import PrepareSection
from climodes.errors import UserError


def season_years(time: xr.DataArray, months: list[int]) -> np.ndarray:
    """The year each time step's season is counted in.

    Months listed before the turn of the year in ``months`` belong to the
    following year's season, so with ``[12, 1, 2]`` December 1990 counts to
    winter 1991, the year of its January (common practice for DJF).

    >>> import pandas as pd
    >>> t = xr.DataArray(pd.date_range("1990-12-01", periods=3, freq="MS"), dims="time")
    >>> season_years(t, [12, 1, 2]).tolist()
    [1991, 1991, 1991]
    """
    turn = next((i for i in range(1, len(months)) if months[i] < months[i - 1]), 0)
    before_turn = months[:turn]
    return time.dt.year.values + np.isin(time.dt.month.values, before_turn)


def aggregate(da: xr.DataArray, how: str, months: list[int] | None, notes: list[str]) -> xr.DataArray:
    """Average each season (``how="seasonal"``) or calendar year (``"annual"``), lazily.

    A season or year counts only if every one of its months has a time step;
    the ones dropped are listed in ``notes``.  At a point where one of its
    months has no value, the mean is missing (see :func:`_period_means`): a
    mean of the months that remain would alias the seasonal cycle into it.
    Each mean is stamped with the time of its middle step (January for
    December-February) and carries CF bounds ``time_bnds``: from the start of
    its first step's interval to the end of its last one's (see
    :func:`step_intervals`), held as the coordinates ``PERIOD`` until the
    results join them (:func:`time_bounds`).
    """
    if how == "none":
        return da
    wanted = months if how == "seasonal" else (months or list(range(1, 13)))
    years = season_years(da["time"], wanted) if how == "seasonal" else da["time"].dt.year.values
    month = da["time"].dt.month.values
    kept, stamps, dropped = [], [], []
    for year in np.unique(years):
        steps = np.flatnonzero(years == year)
        missing = sorted(set(wanted) - set(month[steps]))
        if missing:
            dropped.append(f"{year} (no data for month {', '.join(map(str, missing))})")
            continue
        kept.append(steps)
        stamps.append(steps[len(steps) // 2])
    if dropped:
        notes.append(f"dropped incomplete {'seasons' if how == 'seasonal' else 'years'}: {'; '.join(dropped)}")
    if not kept:
        raise UserError(f"prepare.aggregate: {how} leaves no complete {'season' if how == 'seasonal' else 'year'} "
                        "in the selected period; widen select.period or check select.months")
    steps = np.concatenate(kept)
    label = np.concatenate([np.full(len(s), i) for i, s in enumerate(kept)])
    subset = da.isel(time=steps)
    kwargs = dict(period=label, month=month[steps], count=len(kept))
    if subset.chunks:
        data = subset.data
        if len(data.chunks[0]) > 1:  # every step of a point in one block; blocks kept near dask's chunk size
            data = data.rechunk({0: -1, 1: "auto"})
        data = data.map_blocks(_period_means, **kwargs, chunks=((len(kept),),) + data.chunks[1:], dtype=da.dtype)
    else:
        data = _period_means(np.asarray(subset.values), **kwargs)
    means = da.isel(time=np.array(stamps)).copy(data=data)
    start, end = step_intervals(da["time"])
    first, last = [s[0] for s in kept], [s[-1] for s in kept]
    return means.assign_coords({PERIOD[0]: ("time", start[first]), PERIOD[1]: ("time", end[last])})


PERIOD = ("period_start", "period_end")
"""The coordinates of an averaged field that hold where each mean's interval starts and ends."""


def time_bounds(field: xr.DataArray) -> dict[str, xr.Variable]:
    """The CF bounds ``time_bnds(time, nv)`` of an averaged field's steps; none for a field of single steps."""
    if PERIOD[0] not in field.coords:
        return {}
    return {"time_bnds": xr.Variable(("time", "nv"), np.stack([field[PERIOD[0]].values, field[PERIOD[1]].values],
                                                              axis=1))}


def _period_means(values: np.ndarray, period: np.ndarray, month: np.ndarray, count: int) -> np.ndarray:
    """The mean of each period's steps at each point, missing where one of the period's months has no value.

    ``values`` is a ``(time, ...)`` block, ``period`` says which of ``count``
    periods each step belongs to and ``month`` its calendar month.  The mean
    is taken in float64 and returned in the block's dtype.
    """
    out = np.empty((count,) + values.shape[1:], dtype=values.dtype)
    for p in range(count):
        rows = np.flatnonzero(period == p)
        mean = _quiet_nanmean(values[rows], axis=0, keepdims=False, dtype=np.float64)
        for m in np.unique(month[rows]):
            mean[np.isnan(values[rows[month[rows] == m]]).all(axis=0)] = np.nan
        out[p] = mean
    return out


def step_intervals(time: xr.DataArray) -> tuple[np.ndarray, np.ndarray]:
    """The start and end of the interval each time step stands for.

    Monthly steps stand for their calendar month and daily steps for their
    calendar day (whatever hour they are stamped at); steps of other spacings
    for half a step either side of their stamp.  Works on every CF calendar.
    """
    values = time.values
    spacing = _spacing_days(time)
    if spacing > 365.25 / 20 or abs(spacing - 1) < 0.01:
        unit = "M" if spacing > 1 else "D"
        if np.issubdtype(values.dtype, np.datetime64):
            floor = values.astype(f"datetime64[{unit}]")
            return floor.astype(values.dtype), (floor + 1).astype(values.dtype)
        if unit == "D":
            start = np.array([t.replace(hour=0, minute=0, second=0, microsecond=0) for t in values])
            return start, start + dt.timedelta(days=1)
        start = np.array([t.replace(day=1, hour=0, minute=0, second=0, microsecond=0) for t in values])
        end = np.array([t.replace(year=t.year + t.month // 12, month=t.month % 12 + 1) for t in start])
        return start, end
    half = np.timedelta64(int(spacing * 43200e9), "ns") if np.issubdtype(values.dtype, np.datetime64) \
        else dt.timedelta(days=spacing / 2)
    return values - half, values + half


def _spacing_days(time: xr.DataArray) -> float:
    """The usual time step in days: the median spacing (a year when there is one step)."""
    if time.size < 2:
        return 365.25
    return float(max(np.median(np.diff(days_since_start(time))), 1e-9))


def days_since_start(time: xr.DataArray) -> np.ndarray:
    """Time as float days since the first step, for any calendar."""
    values = time.values
    if np.issubdtype(values.dtype, np.datetime64):
        return (values - values[0]) / np.timedelta64(1, "D")
    return np.array([(v - values[0]).total_seconds() / 86400.0 for v in values])


LEAP_DAY_ONLY = ("standard", "gregorian", "proleptic_gregorian", "julian")
"""Calendars on which 29 February exists in leap years only."""


def key_rule(time: xr.DataArray) -> str:
    """How a field's steps are keyed for their climatology, from their usual spacing.

    ``"yearly"``: one step a year or fewer, one key.  ``"month"``: monthly
    steps, keyed by calendar month.  ``"month_day"``: daily steps (or finer),
    keyed by calendar month and day (see :func:`calendar_keys` for 29
    February).  ``"bins<N>"``: steps between a day and a month apart (pentads,
    weeks), keyed by which of ``N`` equal bins of the year they fall in, ``N``
    being the steps a year rounded (73 for pentads, 52 for weeks): about one
    step per bin and year, as a monthly climatology has, where a day-of-year
    key would leave a handful of samples in each.

    >>> import pandas as pd
    >>> key_rule(xr.DataArray(pd.date_range("2000-01-01", periods=40, freq="5D"), dims="time"))
    'bins73'
    """
    spacing = _spacing_days(time)
    if spacing > 365.25 / 1.5:
        return "yearly"
    if spacing > 365.25 / 20:
        return "month"
    if spacing <= 1.5:
        return "month_day"
    return f"bins{round(float(time.dt.days_in_year.mean()) / spacing)}"


def calendar_keys(time: xr.DataArray, rule: str) -> np.ndarray:
    """Each time step's calendar key under ``rule`` (see :func:`key_rule`), as integers.

    ``"month"``: the month, 1-12.  ``"month_day"``: ``100 * month + day``; on
    calendars where 29 February is a leap day only (:data:`LEAP_DAY_ONLY`) it
    takes 28 February's key, so every other day of a leap year keeps its own
    calendar day and a baseline without a leap year has a key for every day;
    on ``360_day`` and ``all_leap`` calendars 29 and 30 February are days like
    any other.  ``"bins<N>"``: ``floor(N * f)`` with ``f`` the fraction of its
    own year elapsed at the step's stamp (day of year - 1 plus the time of day,
    over the days in that year).  Any other rule: one key, 0.

    >>> import pandas as pd
    >>> t = xr.DataArray(pd.to_datetime(["2004-02-28", "2004-02-29", "2004-03-01"]), dims="time")
    >>> calendar_keys(t, "month_day").tolist()
    [228, 228, 301]
    """
    if rule == "month":
        return time.dt.month.values.astype(int)
    if rule == "month_day":
        month, day = time.dt.month.values.astype(int), time.dt.day.values.astype(int)
        if time.dt.calendar in LEAP_DAY_ONLY:
            day = np.where((month == 2) & (day == 29), 28, day)
        return 100 * month + day
    if rule.startswith("bins"):
        bins = int(rule[4:])
        clock = (time.dt.hour.values * 3600 + time.dt.minute.values * 60 + time.dt.second.values) / 86400
        elapsed = (time.dt.dayofyear.values - 1 + clock) / time.dt.days_in_year.values
        return np.minimum(np.floor(elapsed * bins + 1e-9), bins - 1).astype(int)  # 1e-9: bin edges on a stamp
    return np.zeros(time.size, dtype=int)


@dataclass(frozen=True)
class TimeSteps:
    """Preparation steps that each act on every point's time series: ``(kernel, keyword arguments)`` pairs.

    A kernel takes a ``(time, ...)`` numpy array and returns one of the same
    shape and dtype, each column computed from that column alone.  ``linear``
    says that every kernel is linear in a series without missing values, so
    for such a series ``steps(a x + b y) == a steps(x) + b steps(y)``.

    >>> steps = TimeSteps()  # no steps: the series as they are
    >>> steps(np.ones((3, 2))).shape
    (3, 2)
    """

    kernels: tuple[tuple[Callable, dict], ...] = ()
    linear: bool = True

    def __call__(self, values: np.ndarray) -> np.ndarray:
        for kernel, kwargs in self.kernels:
            values = kernel(values, **kwargs)
        return values

    def then(self, kernel: Callable, linear: bool = True, **kwargs) -> "TimeSteps":
        """These steps followed by ``kernel(values, **kwargs)``."""
        return TimeSteps(self.kernels + ((kernel, kwargs),), self.linear and linear)

    def applied(self, da: xr.DataArray) -> xr.DataArray:
        """The steps applied to a ``(time, lat, lon)`` field, lazily.

        Each dask block holds every time step of some points (the time axis is
        joined into one chunk), so the steps run block by block in plain numpy,
        in the field's own dtype, on C-ordered ``(time, lat, lon)`` blocks.
        """
        if not self.kernels:
            return da
        if da.dims[0] != "time":
            raise ValueError("fields are (time, lat, lon) from climodes.fields on")
        if da.chunks:
            data = da.data.rechunk({0: -1}).map_blocks(self, dtype=da.dtype)
        else:
            data = self(np.asarray(da.values))
        return da.copy(data=data)


def _quiet_nanmean(values: np.ndarray, axis: int = 0, keepdims: bool = True, dtype=None) -> np.ndarray:
    with warnings.catch_warnings():  # points missing at every step have no mean: NaN, as they should
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmean(values, axis=axis, keepdims=keepdims, dtype=dtype)


def _minus_group_means(values: np.ndarray, keys: np.ndarray, in_base: np.ndarray) -> np.ndarray:
    """``values`` minus, at each step, the mean over the baseline steps with the same key (NaN skipped).

    Blocks are C-ordered ``(time, ...)``, so each group's rows are whole
    contiguous rows: a loop over groups (12 months, or 366 calendar days) costs
    one pass over the block.
    """
    mean = np.mean if not np.isnan(values).any() else _quiet_nanmean
    out = np.empty_like(values)
    for key in np.unique(keys):
        steps = np.flatnonzero(keys == key)
        out[steps] = values[steps] - mean(values[steps[in_base[steps]]], axis=0, keepdims=True)
    return out


def climatology_step(da: xr.DataArray, how: str, baseline: list[str] | None) -> TimeSteps:
    """The step that subtracts the baseline climatology (``"climatology"``) or mean (``"mean"``) of ``da``.

    The climatology is per calendar key (see :func:`key_rule`): calendar
    month for monthly data, calendar month and day for daily data, bins of the
    year for steps between, and the plain mean for one step a year.  Missing
    values are skipped in the means.
    """
    if how == "none":
        return TimeSteps()
    in_base = np.ones(da.sizes["time"], dtype=bool)
    if baseline is not None:
        in_base[:] = False
        in_base[da["time"].to_index().slice_indexer(*baseline)] = True
    if not in_base.any():
        raise UserError(f"prepare.baseline: {baseline} holds no time step of the selected data; "
                        "choose a baseline inside select.period")
    rule = "mean" if how == "mean" else key_rule(da["time"])
    keys = calendar_keys(da["time"], rule)
    if missing := sorted(set(keys) - set(keys[in_base])):
        raise UserError(f"prepare.baseline: {baseline} has no data for {_key_text(missing[0], rule)}, "
                        "so its climatology is undefined; lengthen the baseline")
    return TimeSteps().then(_minus_group_means, keys=keys, in_base=in_base)


def _key_text(key: int, rule: str) -> str:
    """A calendar key as a person reads it: "month 2", "day 02-28", "bin 12 of 73"."""
    if rule == "month_day":
        return f"day {key // 100:02d}-{key % 100:02d}"
    if rule.startswith("bins"):
        return f"bin {key} of {rule[4:]} (of the year)"
    return f"month {key}"


def anomalies(da: xr.DataArray, how: str, baseline: list[str] | None) -> xr.DataArray:
    """``da`` minus its baseline climatology or mean, lazily (see :func:`climatology_step`)."""
    return climatology_step(da, how, baseline).applied(da)


def _minus_line(values: np.ndarray, days: np.ndarray) -> np.ndarray:
    days = days.reshape((-1,) + (1,) * (values.ndim - 1))
    valid = ~np.isnan(values)
    t = np.where(valid, days, np.nan)
    t_mean = _quiet_nanmean(t)
    x_mean = _quiet_nanmean(values)
    with np.errstate(invalid="ignore", divide="ignore"):
        slope = np.nansum((t - t_mean) * (values - x_mean), axis=0, keepdims=True) / np.nansum(
            (t - t_mean) ** 2, axis=0, keepdims=True)
    return (values - x_mean - slope * (days - t_mean)).astype(values.dtype)


def detrend_linear(da: xr.DataArray) -> xr.DataArray:
    """Remove the least-squares straight line in time (in days) at each point, skipping missing steps."""
    return TimeSteps().then(_minus_line, days=days_since_start(da["time"])).applied(da)


def _scaled(values: np.ndarray) -> np.ndarray:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        std = np.nanstd(values, axis=0, ddof=1, keepdims=True)
    return values / np.where(std > 0, std, np.nan)


def standardize(da: xr.DataArray) -> xr.DataArray:
    """Divide each point by its standard deviation in time; constant points become missing."""
    return TimeSteps().then(_scaled, linear=False).applied(da).assign_attrs({**da.attrs, "units": "1"})


def time_steps(da: xr.DataArray, spec: PrepareSection, months: list[int] | None,
               notes: list[str]) -> tuple[xr.DataArray, TimeSteps]:
    """The selected field's seasonal or annual means (lazy), and the steps of ``spec`` that follow them."""
    da = aggregate(da, spec.aggregate, months, notes)
    steps = climatology_step(da, spec.anomalies, spec.baseline)
    if spec.detrend == "linear":
        steps = steps.then(_minus_line, days=days_since_start(da["time"]))
    if spec.standardize:
        steps = steps.then(_scaled, linear=False)
    return da, steps


def prepare(da: xr.DataArray, spec: PrepareSection, months: list[int] | None, notes: list[str]) -> xr.DataArray:
    """Apply every preparation step of ``spec`` to the selected field, lazily."""
    da, steps = time_steps(da, spec, months, notes)
    out = steps.applied(da)
    return out.assign_attrs({**da.attrs, "units": "1"}) if spec.standardize else out
