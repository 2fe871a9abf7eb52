"""Turn a selected field into the anomalies that are decomposed, and keep what that took.

In order: seasonal or annual means (:func:`aggregate`), then along each
point's time series anomalies against a baseline climatology or mean, a linear
trend removed, standardisation, and last centring.  The functions take lazy
``(time, lat, lon)`` DataArrays and return them (or the steps still to apply);
only the time coordinate is looked at in memory.

Each step along time is fitted on a point's own series and then applied to it
(:data:`STEPS`): the climatology per calendar key (:func:`calendar_keys`), the
trend's slope and intercept, the scale, and the offset of the centring
(:func:`centre`).  :func:`time_steps` hands them to a solver as
:class:`TimeSteps`, plain numpy functions, so it can apply them where it is
cheapest: the fits and their application are linear in a complete series, so
the streaming solvers apply them to their small ``(time x modes)`` products
instead of to every block of the field in every pass.  The solver returns the
quantities fitted at every point from its first pass; they go to ``modes.nc``
(:func:`fitted_variables`), come back with :func:`fitted_preparation`, and
:func:`apply` them to another field on the same grid (with :func:`keys_of` of
its times) or :func:`unapply` them to anomalies: the same functions as the run.
"""

from __future__ import annotations

import datetime as dt
import re
import warnings
from dataclasses import dataclass, replace
from typing import Callable

import numpy as np
import xarray as xr

from climodes.config import PrepareSection
from climodes.dates import in_period
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
        if len(data.chunks[0]) > 1:  # every step of a point in one block, no bigger than the chunks it joins
            rows = max(1, max(data.chunks[1]) * max(data.chunks[0]) // data.shape[0])
            data = data.rechunk({0: -1, 1: rows})
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


# --- time as the trend reads it


def time_origin(time: xr.DataArray) -> str:
    """The first step, to the second, as ``YYYY-MM-DDTHH:MM:SS`` in the field's own calendar: a trend's origin."""
    first = time.values[0]
    if isinstance(first, np.datetime64):
        return str(np.datetime_as_string(first.astype("datetime64[s]")))
    return f"{first.year:04d}-{first.month:02d}-{first.day:02d}T{first.hour:02d}:{first.minute:02d}:{first.second:02d}"


def days_since(time: xr.DataArray, origin: str) -> np.ndarray:
    """Each step's time in float days since ``origin`` (see :func:`time_origin`), in the steps' calendar."""
    values = time.values
    if np.issubdtype(values.dtype, np.datetime64):
        return (values - np.datetime64(origin)) / np.timedelta64(1, "D")
    import cftime

    start = cftime.datetime(*map(int, re.split(r"(?<=\d)[-T:]", origin)), calendar=values[0].calendar)
    return np.array([(v - start).total_seconds() / 86400.0 for v in values])


# --- the steps along time, each a fit and its application


@dataclass(frozen=True, eq=False)
class TimeKeys:
    """What the preparation reads from a field's time steps.

    ``index`` is each step's row in the climatology (its calendar key's place
    among the ``count`` keys fitted), ``days`` its time in days since the
    trend's origin, and ``in_base`` whether it is a baseline step (what the
    climatology is fitted on).
    """

    index: np.ndarray
    days: np.ndarray
    in_base: np.ndarray
    count: int

    def part(self, steps: slice) -> "TimeKeys":
        """The keys of some of the steps, for a block of them."""
        return replace(self, index=self.index[steps], days=self.days[steps], in_base=self.in_base[steps])


def _quiet_nanmean(values: np.ndarray, axis: int = 0, keepdims: bool = True, dtype=None) -> np.ndarray:
    with warnings.catch_warnings():  # points missing at every step have no mean: NaN, as they should
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmean(values, axis=axis, keepdims=keepdims, dtype=dtype)


def _fit_climatology(values: np.ndarray, keys: TimeKeys) -> dict[str, np.ndarray]:
    """The mean over the baseline steps of each calendar key at each point, NaN skipped, in float64."""
    mean = np.mean if not np.isnan(values).any() else _quiet_nanmean
    climatology = np.empty((keys.count,) + values.shape[1:])
    for row in range(keys.count):
        climatology[row] = mean(values[np.flatnonzero((keys.index == row) & keys.in_base)], axis=0,
                                keepdims=False, dtype=np.float64)
    return {"climatology": climatology}


KEY_WINDOW = 64  # steps whose climatology is gathered at a time when it is added or removed


def _by_key(values: np.ndarray, climatology: np.ndarray, keys: TimeKeys, sign: int) -> np.ndarray:
    """``values`` plus ``sign`` times the climatology of each step's key.

    Blocks are C-ordered ``(time, ...)``: a few whole rows at a time, the climatology of their keys is
    gathered (a small copy of :data:`KEY_WINDOW` rows) and added in place, one pass over the block.
    """
    climatology = climatology.astype(values.dtype, copy=False)
    add = np.add if sign > 0 else np.subtract
    out = np.empty_like(values)
    for start in range(0, len(values), KEY_WINDOW):
        rows = slice(start, start + KEY_WINDOW)
        add(values[rows], climatology[keys.index[rows]], out=out[rows])
    return out


def _minus_climatology(values: np.ndarray, fitted: dict, keys: TimeKeys) -> np.ndarray:
    return _by_key(values, fitted["climatology"], keys, -1)


def _plus_climatology(values: np.ndarray, fitted: dict, keys: TimeKeys) -> np.ndarray:
    return _by_key(values, fitted["climatology"], keys, +1)


def _fit_line(values: np.ndarray, keys: TimeKeys) -> dict[str, np.ndarray]:
    """The least-squares line against ``keys.days`` at each point, missing steps skipped: its slope
    (per day) and its intercept at the time origin, in float64."""
    days = keys.days.reshape((-1,) + (1,) * (values.ndim - 1))
    t = np.where(np.isnan(values), np.nan, days)
    t_mean = _quiet_nanmean(t)
    x_mean = _quiet_nanmean(values, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        slope = np.nansum((t - t_mean) * (values - x_mean), axis=0, keepdims=True) / np.nansum(
            (t - t_mean) ** 2, axis=0, keepdims=True)
    return {"slope": slope[0], "intercept": (x_mean - slope * t_mean)[0]}


def _line(fitted: dict, keys: TimeKeys, ndim: int) -> np.ndarray:
    """The fitted line at each step: ``intercept + slope * days since the origin`` (float64)."""
    return fitted["intercept"] + fitted["slope"] * keys.days.reshape((-1,) + (1,) * (ndim - 1))


def _minus_line(values: np.ndarray, fitted: dict, keys: TimeKeys) -> np.ndarray:
    return (values - _line(fitted, keys, values.ndim)).astype(values.dtype)


def _plus_line(values: np.ndarray, fitted: dict, keys: TimeKeys) -> np.ndarray:
    return (values + _line(fitted, keys, values.ndim)).astype(values.dtype)


def _fit_scale(values: np.ndarray, keys: TimeKeys) -> dict[str, np.ndarray]:
    """Each point's standard deviation in time (ddof = 1, missing steps skipped); NaN where it is 0."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        std = np.nanstd(values, axis=0, ddof=1, dtype=np.float64)
    return {"scale": np.where(std > 0, std, np.nan)}


def _scaled(values: np.ndarray, fitted: dict, keys: TimeKeys) -> np.ndarray:
    return values / fitted["scale"].astype(values.dtype)


def _unscaled(values: np.ndarray, fitted: dict, keys: TimeKeys) -> np.ndarray:
    return values * fitted["scale"].astype(values.dtype)


@dataclass(frozen=True)
class Step:
    """One preparation step: ``fit(values, keys)`` gives its quantities at each point (a dict of arrays,
    points last, ``per_key`` ones with a row per calendar key first), ``apply(values, fitted, keys)``
    removes them and ``unapply`` puts them back.  ``linear``: the fit and the application are linear in a
    complete series, so the fit-then-apply of a sum is the sum of theirs."""

    fit: Callable
    apply: Callable
    unapply: Callable
    quantities: tuple[str, ...]
    per_key: bool = False
    linear: bool = True


STEPS = {
    "climatology": Step(_fit_climatology, _minus_climatology, _plus_climatology, ("climatology",), per_key=True),
    "trend": Step(_fit_line, _minus_line, _plus_line, ("slope", "intercept")),
    "scale": Step(_fit_scale, _scaled, _unscaled, ("scale",), linear=False),
}
"""The steps, by name, in the order they run: anomalies, trend, standardising."""


def _filled(prepared: np.ndarray) -> np.ndarray:
    """A copy with missing values set to zero anomaly (the missing-data rule, ``prepare.max_missing``).

    Most blocks have none: their minimum, one quick pass, is then not NaN, and no mask is made."""
    filled = prepared.copy()
    if filled.size and np.isnan(filled.min()):
        filled[np.isnan(filled)] = 0
    return filled


def _less(filled: np.ndarray, offset: np.ndarray) -> np.ndarray:
    filled -= offset.astype(filled.dtype)
    return filled


def centre(prepared: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The last step: missing values set to zero anomaly, then each point's time mean removed.

    Returns the centred series (a new array in ``prepared``'s dtype) and the
    offset removed (in that dtype, taken in float64): the time mean of the
    prepared series, a missing value counted as zero.
    """
    filled = _filled(prepared)
    offset = filled.mean(axis=0, dtype=np.float64).astype(filled.dtype)
    return _less(filled, offset), offset


@dataclass(frozen=True, eq=False)
class Preparation:
    """What a preparation does, without its fitted values: the steps that run (names in :data:`STEPS`,
    in order), how time steps are keyed (:func:`calendar_keys`; ``key_values`` are the keys fitted, in
    the order of the climatology's rows), the trend's time origin (:func:`time_origin`) and the calendar."""

    steps: tuple[str, ...] = ()
    key_rule: str = "none"
    key_values: tuple[int, ...] = (0,)
    origin: str = ""
    calendar: str = ""


@dataclass(frozen=True, eq=False)
class TimeSteps:
    """The preparation steps along time of one field, still to fit and apply, with the field's own
    :class:`TimeKeys`: what a solver gets.

    Each step is fitted on a ``(time, ...)`` block and applied to it, every
    point from its own series (:meth:`fit_apply`).  ``linear`` says that every
    step is linear in a series without missing values, so for such a series
    ``steps(a x + b y) == a steps(x) + b steps(y)``.

    >>> steps = TimeSteps()  # no steps: the series as they are
    >>> steps(np.ones((3, 2))).shape
    (3, 2)
    """

    preparation: Preparation = Preparation()
    keys: TimeKeys | None = None

    @property
    def linear(self) -> bool:
        return all(STEPS[name].linear for name in self.preparation.steps)

    @property
    def values_per_point(self) -> int:
        """How many fitted values each grid point keeps (its offset included)."""
        return 1 + sum(len(STEPS[name].quantities) * (len(self.preparation.key_values) if STEPS[name].per_key else 1)
                       for name in self.preparation.steps)

    def then(self, name: str) -> "TimeSteps":
        """These steps followed by the step ``name`` of :data:`STEPS`."""
        return replace(self, preparation=replace(self.preparation, steps=self.preparation.steps + (name,)))

    def fit_apply(self, values: np.ndarray) -> tuple[np.ndarray, dict[str, np.ndarray]]:
        """Each step fitted on ``values`` and applied to them in turn: the prepared series and the
        fitted quantities (without the final centring, see :func:`centre`).

        The fits are taken in float64 and kept in ``values``' dtype, the
        precision the steps work in: what is returned is exactly what was applied.
        """
        fitted = {}
        for name in self.preparation.steps:
            step = STEPS[name]
            fitted.update({q: v.astype(values.dtype, copy=False) for q, v in step.fit(values, self.keys).items()})
            values = step.apply(values, fitted, self.keys)
        return values, fitted

    def __call__(self, values: np.ndarray) -> np.ndarray:
        return self.fit_apply(values)[0]

    def blank(self, points: int, dtype=np.float64) -> dict[str, np.ndarray]:
        """The fitted quantities of ``points`` points without data: NaN, the offset included."""
        rows = len(self.preparation.key_values)
        out = {}
        for name in self.preparation.steps:
            step = STEPS[name]
            out.update({quantity: np.full(((rows,) if step.per_key else ()) + (points,), np.nan, dtype=dtype)
                        for quantity in step.quantities})
        return {**out, "offset": np.full(points, np.nan, dtype=dtype)}

    def applied(self, da: xr.DataArray) -> xr.DataArray:
        """The steps applied to a ``(time, lat, lon)`` field, lazily.

        Each dask block holds every time step of some points (the time axis is
        joined into one chunk), so the steps run block by block in plain numpy,
        in the field's own dtype, on C-ordered ``(time, lat, lon)`` blocks.
        """
        if not self.preparation.steps:
            return da
        if da.dims[0] != "time":
            raise ValueError("fields are (time, lat, lon) from climodes.fields on")
        if da.chunks:
            data = da.data.rechunk({0: -1}).map_blocks(self, dtype=da.dtype)
        else:
            data = self(np.asarray(da.values))
        return da.copy(data=data)


@dataclass(frozen=True, eq=False)
class Fitted:
    """A preparation fitted on training data: what it does, and its quantities at each point (points
    last): ``climatology`` (a row per calendar key), ``slope`` (per day) and ``intercept`` (at the time
    origin) of the trend, ``scale``, and the ``offset`` removed last (see :func:`centre`)."""

    preparation: Preparation
    quantities: dict[str, np.ndarray]


def fit(values: np.ndarray, steps: TimeSteps) -> Fitted:
    """The preparation ``steps`` fitted on a ``(time, ...)`` block of the field they were made for.

    >>> import pandas as pd
    >>> field = xr.DataArray(np.arange(24.0)[:, None], dims=("time", "x"),
    ...                      coords={"time": pd.date_range("2000-01-01", periods=24, freq="MS")})
    >>> fitted = fit(field.values, climatology_step(field, "climatology", None))
    >>> fitted.quantities["climatology"][:3, 0].tolist(), fitted.quantities["offset"].tolist()
    ([6.0, 7.0, 8.0], [0.0])
    """
    prepared, quantities = steps.fit_apply(values)
    quantities["offset"] = centre(prepared)[1]
    return Fitted(steps.preparation, quantities)


def apply(values: np.ndarray, fitted: Fitted, keys: TimeKeys) -> np.ndarray:
    """The anomalies of ``values`` under a fitted preparation: each step applied with the fitted
    quantities, missing values set to zero anomaly, the offset removed.

    ``values`` is ``(time, ...)`` on the grid of the fit (points, or latitude
    and longitude, in the same order); ``keys`` comes from :func:`keys_of` of
    its times.  Applied to the field the preparation was fitted on, this gives
    the anomalies the modes were computed from.  Points the run did not use
    have NaN quantities, so NaN anomalies.

    >>> import pandas as pd
    >>> field = xr.DataArray(np.arange(24.0)[:, None], dims=("time", "x"),
    ...                      coords={"time": pd.date_range("2000-01-01", periods=24, freq="MS")})
    >>> fitted = fit(field.values, climatology_step(field, "climatology", None))
    >>> later = xr.DataArray(pd.date_range("2003-01-01", periods=3, freq="MS"), dims="time")  # Jan-Mar 2003
    >>> apply(np.array([[20.0], [21.0], [np.nan]]), fitted, keys_of(later, fitted))[:, 0].tolist()
    [14.0, 14.0, 0.0]
    """
    for name in fitted.preparation.steps:
        values = STEPS[name].apply(values, fitted.quantities, keys)
    return _less(_filled(values), fitted.quantities["offset"])


def unapply(anomalies: np.ndarray, fitted: Fitted, keys: TimeKeys) -> np.ndarray:
    """The inverse of :func:`apply`: the offset added back, the scale undone, the trend and the
    climatology added back, so ``unapply(apply(x)) == x`` wherever ``x`` has a value (a missing value
    comes back as the climatology and trend of its step)."""
    values = anomalies + fitted.quantities["offset"].astype(anomalies.dtype)
    for name in reversed(fitted.preparation.steps):
        values = STEPS[name].unapply(values, fitted.quantities, keys)
    return values


_SAME_CALENDAR = {"gregorian": "standard", "proleptic_gregorian": "standard", "365_day": "noleap",
                  "366_day": "all_leap"}


def _key_name(rule: str) -> str:
    if rule.startswith("bins"):
        return f"{rule[4:]} bins of the year"
    return {"month": "calendar month", "month_day": "calendar month and day", "yearly": "one key (yearly steps)",
            "mean": "one key (the mean)", "none": "no key"}[rule]


def keys_of(time: xr.DataArray, fitted: Fitted) -> TimeKeys:
    """What a fitted preparation reads from the time steps of a field: each step's row in the fitted
    climatology and its days since the trend's origin.  Use it with :func:`apply` and :func:`unapply`.

    Raises
    ------
    UserError
        If the steps are on another calendar, are spaced so that they would be keyed otherwise
        (daily steps against a monthly climatology), or fall on a calendar key the fit does not hold.
    """
    time = time if isinstance(time, xr.DataArray) else xr.DataArray(time, dims="time")
    prep = fitted.preparation
    calendar = time.dt.calendar
    if prep.calendar and _SAME_CALENDAR.get(calendar, calendar) != _SAME_CALENDAR.get(prep.calendar, prep.calendar):
        calendar = _stated_calendar(time)  # as the file says it
        raise UserError(f"input.paths: the field's calendar is {calendar}, but the preparation was fitted on the "
                        f"{prep.calendar} calendar; give the field on the {prep.calendar} calendar")
    if prep.key_rule not in ("mean", "none") and time.size > 1 and (rule := key_rule(time)) != prep.key_rule:
        raise UserError(f"input.paths: the field's time steps are keyed by {_key_name(rule)}, but the "
                        f"climatology was fitted by {_key_name(prep.key_rule)}; give a field with the "
                        "training field's time spacing")
    keys = calendar_keys(time, prep.key_rule)
    fitted_keys = np.array(prep.key_values)
    rows = np.minimum(np.searchsorted(fitted_keys, keys), fitted_keys.size - 1)
    if (absent := fitted_keys[rows] != keys).any():
        first = int(np.argmax(absent))
        raise UserError(f"input.paths: the step {str(time.values[first])[:19]} falls on "
                        f"{_key_text(int(keys[first]), prep.key_rule)}, which the fitted climatology does not hold "
                        f"(the training field had {len(fitted_keys)} keys); select the months the training used")
    days = days_since(time, prep.origin) if "trend" in prep.steps else np.zeros(time.size)
    return TimeKeys(rows, days, np.ones(time.size, dtype=bool), fitted_keys.size)


def _stated_calendar(time: xr.DataArray) -> str:
    """The calendar of ``time`` as its file states it (dates of the ``standard`` calendar decode to numpy
    dates, which xarray calls ``proleptic_gregorian``), else as xarray names it."""
    return str(time.encoding.get("calendar") or time.dt.calendar)


def _field_steps(da: xr.DataArray, rule: str, keys: np.ndarray, in_base: np.ndarray) -> TimeSteps:
    """No steps yet, with ``da``'s calendar keys under ``rule`` and its days since its first step."""
    values, index = np.unique(keys, return_inverse=True)
    origin = time_origin(da["time"])
    preparation = Preparation((), rule, tuple(int(v) for v in values), origin, _stated_calendar(da["time"]))
    return TimeSteps(preparation, TimeKeys(index.reshape(-1), days_since(da["time"], origin), in_base, values.size))


def climatology_step(da: xr.DataArray, how: str, baseline: list[str] | None) -> TimeSteps:
    """The step that subtracts the baseline climatology (``"climatology"``) or mean (``"mean"``) of ``da``.

    The climatology is per calendar key (see :func:`key_rule`): calendar
    month for monthly data, calendar month and day for daily data, bins of the
    year for steps between, and the plain mean for one step a year.  Missing
    values are skipped in the means.  The steps come with ``da``'s time keys,
    so a trend or scale may follow (:meth:`TimeSteps.then`).
    """
    if how == "none":
        return _field_steps(da, "none", np.zeros(da.sizes["time"], dtype=int), np.ones(da.sizes["time"], dtype=bool))
    in_base = (np.ones(da.sizes["time"], dtype=bool) if baseline is None
               else in_period(da["time"].values, baseline, "prepare.baseline"))
    if not in_base.any():
        raise UserError(f"prepare.baseline: {baseline} holds no time step of the selected data; "
                        "choose a baseline inside select.period")
    rule = "mean" if how == "mean" else key_rule(da["time"])
    keys = calendar_keys(da["time"], rule)
    if missing := sorted(set(keys) - set(keys[in_base])):
        raise UserError(f"prepare.baseline: {baseline} has no data for {_key_text(missing[0], rule)}, "
                        "so its climatology is undefined; lengthen the baseline")
    return _field_steps(da, rule, keys, in_base).then("climatology")


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


def detrend_linear(da: xr.DataArray) -> xr.DataArray:
    """Remove the least-squares straight line in time (in days) at each point, skipping missing steps."""
    return climatology_step(da, "none", None).then("trend").applied(da)


def _short_baseline(time: xr.DataArray, baseline: list[str]) -> list[str]:
    """A note when the data cover only some of the baseline's years (the climatology is then of those)."""
    years = np.unique(time.dt.year.values[in_period(time.values, baseline, "prepare.baseline")])
    span = int(baseline[1].split("-")[0]) - int(baseline[0].split("-")[0]) + 1
    if years.size >= span:
        return []
    return [f"prepare.baseline {baseline[0]} to {baseline[1]}: the data cover {years.size} of its {span} years "
            f"({years[0]} to {years[-1]}), so the climatology is of those years only"]


def standardize(da: xr.DataArray) -> xr.DataArray:
    """Divide each point by its standard deviation in time; constant points become missing."""
    return climatology_step(da, "none", None).then("scale").applied(da).assign_attrs({**da.attrs, "units": "1"})


def time_steps(da: xr.DataArray, spec: PrepareSection, months: list[int] | None,
               notes: list[str]) -> tuple[xr.DataArray, TimeSteps]:
    """The selected field's seasonal or annual means (lazy), and the steps of ``spec`` that follow them."""
    da = aggregate(da, spec.aggregate, months, notes)
    steps = climatology_step(da, spec.anomalies, spec.baseline)
    if spec.anomalies != "none" and spec.baseline is not None:
        notes += _short_baseline(da["time"], spec.baseline)
    if spec.detrend == "linear":
        steps = steps.then("trend")
    if spec.standardize:
        steps = steps.then("scale")
    return da, steps


def prepare(da: xr.DataArray, spec: PrepareSection, months: list[int] | None, notes: list[str]) -> xr.DataArray:
    """Apply every preparation step of ``spec`` to the selected field, lazily."""
    da, steps = time_steps(da, spec, months, notes)
    out = steps.applied(da)
    return out.assign_attrs({**da.attrs, "units": "1"}) if spec.standardize else out


# --- the fitted preparation in modes.nc

_KEY_COORDINATE = {
    "month": "calendar month (1-12)",
    "month_day": "calendar month and day: 100 * month + day",
    "yearly": "one key for every step (yearly steps)",
    "mean": "one key for every step (anomalies against the baseline mean)",
}
_KEY_RULE_TEXT = {
    "month": "keyed by calendar month",
    "month_day": ("keyed by calendar month and day; 29 February shares 28 February's key on the standard, "
                  "gregorian, proleptic_gregorian and julian calendars, and is a day of its own on all_leap and "
                  "360_day (as is 30 February)"),
    "yearly": "one key: the steps are a year apart",
    "mean": "one key: anomalies against the baseline mean",
}
_NOT_RUN = {"climatology": "climatology (prepare.anomalies: none)", "trend": "trend (prepare.detrend: none)",
            "scale": "scale (prepare.standardize: false)"}


def _key_rule_text(rule: str) -> str:
    if rule.startswith("bins"):
        return (f"keyed by {rule[4:]} equal bins of the year: bin floor({rule[4:]} * f), f the fraction of its own "
                "year elapsed at the step")
    return _KEY_RULE_TEXT[rule]


def fitted_variables(fitted: Fitted, units: str | None) -> dict[str, xr.DataArray]:
    """The fitted preparation as CF variables for ``modes.nc``, from quantities shaped ``(..., lat, lon)``.

    ``fitted_climatology(calendar_key, lat, lon)`` with its ``calendar_key``
    coordinate and the key rule, ``fitted_trend_slope`` (``units`` per day)
    and ``fitted_trend_intercept`` with the time origin, ``fitted_scale`` and
    ``fitted_offset``, each in the precision the anomalies were formed in
    (float64, or a float32 field's own precision in the randomized solver:
    the values it applied); the variables of a step that did not run
    are left out, and ``fitted_offset`` (always there) says which steps ran and
    which did not.  :func:`fitted_preparation` reads them back.
    """
    prep, values = fitted.preparation, fitted.quantities
    space = ("lat", "lon")
    field_units = {"units": units} if units else {}
    out = {}
    if "climatology" in prep.steps:
        key = xr.DataArray(np.array(prep.key_values, dtype=np.int32), dims="calendar_key",
                           attrs={"long_name": _KEY_COORDINATE.get(prep.key_rule, "bin of the year (0 first)"),
                                  "units": "1"})
        out["fitted_climatology"] = xr.DataArray(
            values["climatology"], dims=("calendar_key", *space), coords={"calendar_key": key},
            attrs={"long_name": "baseline climatology removed at each point, per calendar key", **field_units,
                   "key_rule": prep.key_rule, "calendar": prep.calendar,
                   "comment": _key_rule_text(prep.key_rule) + "; the baseline is prepare.baseline of climodes_config"})
    if "trend" in prep.steps:
        line = {"time_origin": prep.origin, "calendar": prep.calendar,
                "comment": "line = fitted_trend_intercept + fitted_trend_slope * (days since time_origin), "
                           "the least-squares line of the anomalies, removed after the climatology"}
        out["fitted_trend_slope"] = xr.DataArray(
            values["slope"], dims=space,
            attrs={"long_name": "slope of the linear trend removed at each point",
                   **({"units": f"{units} day-1"} if units else {}), **line})
        out["fitted_trend_intercept"] = xr.DataArray(
            values["intercept"], dims=space,
            attrs={"long_name": "value of the linear trend at time_origin", **field_units, **line})
    if "scale" in prep.steps:
        out["fitted_scale"] = xr.DataArray(
            values["scale"], dims=space,
            attrs={"long_name": "standard deviation (ddof=1) each point was divided by", **field_units})
    not_run = [text for name, text in _NOT_RUN.items() if name not in prep.steps]
    out["fitted_offset"] = xr.DataArray(
        values["offset"], dims=space,
        attrs={"long_name": "time mean removed last (centring)",
               **({"units": "1"} if "scale" in prep.steps else field_units),
               "preparation_steps": " ".join(prep.steps + ("offset",)), "calendar": prep.calendar,
               "comment": ("anomaly = (value after the steps in preparation_steps, a missing one set to 0) - "
                           "fitted_offset; NaN where the point was not used (point_status); "
                           f"not run: {', '.join(not_run) if not_run else 'none'}")})
    return out


def fitted_preparation(results: xr.Dataset) -> Fitted:
    """The preparation a run fitted, read back from its results (:func:`climodes.results.open_results`).

    Its quantities are shaped ``(..., lat, lon)`` like the results' ``eof``
    maps, so it applies to a ``(time, lat, lon)`` field on the same grid::

        results = open_results("results/run")
        fitted = fitted_preparation(results)
        keys = keys_of(new_field["time"], fitted)
        anomalies = apply(new_field.values, fitted, keys)      # as the run prepared its own field
        values = unapply(anomalies, fitted, keys)              # and back

    Raises
    ------
    UserError
        If the file holds no fitted preparation, or lacks a variable its steps need.
    """
    source = results.encoding.get("source", "the results file")
    if "fitted_offset" not in results:
        raise UserError(f"{source}: holds no fitted preparation (fitted_offset); it was written by an earlier "
                        "climodes: run it again")
    space = results["eof"].dims[1:]
    offset = results["fitted_offset"]
    steps = tuple(name for name in offset.attrs.get("preparation_steps", "").split() if name != "offset")
    needed = {"climatology": ["fitted_climatology"], "trend": ["fitted_trend_slope", "fitted_trend_intercept"],
              "scale": ["fitted_scale"]}
    if absent := [name for step in steps for name in needed.get(step, [f"a step called {step}"]) if name not in results]:
        raise UserError(f"{source}: fitted_offset says the steps {' '.join(steps)} ran, but {absent[0]} is not "
                        "there; the file was changed after climodes wrote it: run climodes again")

    def read(name: str, *first: str) -> np.ndarray:
        return np.asarray(results[name].transpose(*first, *space).values, dtype=np.float64)

    quantities = {"offset": read("fitted_offset")}
    rule, keys, origin = "none", (0,), ""
    if "climatology" in steps:
        quantities["climatology"] = read("fitted_climatology", "calendar_key")
        rule = results["fitted_climatology"].attrs["key_rule"]
        keys = tuple(int(k) for k in results["calendar_key"].values)
    if "trend" in steps:
        quantities["slope"], quantities["intercept"] = read("fitted_trend_slope"), read("fitted_trend_intercept")
        origin = results["fitted_trend_slope"].attrs["time_origin"]
    if "scale" in steps:
        quantities["scale"] = read("fitted_scale")
    return Fitted(Preparation(steps, rule, keys, origin, offset.attrs.get("calendar", "")), quantities)


def fitted_units(results: xr.Dataset) -> str | None:
    """The units of the field the preparation was fitted on (the input's), as the fitted variables keep them:
    ``fitted_scale`` has them when the field was standardised, ``fitted_offset`` otherwise."""
    holder = "fitted_scale" if "fitted_scale" in results else "fitted_offset"
    return results[holder].attrs.get("units") if holder in results else None
