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

import warnings
from dataclasses import dataclass
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
    """Average each season (``how="seasonal"``) or calendar year (``"annual"``).

    A season or year counts only if every one of its months has data; the ones
    dropped are listed in ``notes``.  Each mean is stamped with the time of
    its middle step (January for December-February).
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
    label = np.concatenate([np.full(len(s), i) for i, s in enumerate(kept)])
    subset = da.isel(time=np.concatenate(kept)).assign_coords(group=("time", label))
    means = subset.groupby("group").mean("time").rename(group="time")
    means = means.assign_coords(time=da["time"].isel(time=stamps).values)
    means["time"].attrs = da["time"].attrs
    means.attrs = da.attrs
    return means


def _steps_per_year(time: xr.DataArray) -> float:
    if time.size < 2:
        return 1.0
    return 365.25 / max(np.median(np.diff(days_since_start(time))), 1e-9)


def days_since_start(time: xr.DataArray) -> np.ndarray:
    """Time as float days since the first step, for any calendar."""
    values = time.values
    if np.issubdtype(values.dtype, np.datetime64):
        return (values - values[0]) / np.timedelta64(1, "D")
    return np.array([(v - values[0]).total_seconds() / 86400.0 for v in values])


def _calendar_keys(time: xr.DataArray, per_year: float) -> tuple[np.ndarray, str]:
    if per_year < 20:
        return time.dt.month.values, "month"
    return time.dt.dayofyear.values, "day of year"


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


def _quiet_nanmean(values: np.ndarray, axis: int = 0, keepdims: bool = True) -> np.ndarray:
    with warnings.catch_warnings():  # points missing at every step have no mean: NaN, as they should
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmean(values, axis=axis, keepdims=keepdims)


def _minus_group_means(values: np.ndarray, keys: np.ndarray, in_base: np.ndarray) -> np.ndarray:
    """``values`` minus, at each step, the mean over the baseline steps with the same key (NaN skipped).

    Blocks are C-ordered ``(time, ...)``, so each group's rows are whole
    contiguous rows: a loop over groups (12 months, or 366 days of year) costs
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

    The climatology is per calendar month for monthly data, per day of year
    for daily data, and the plain mean for one step a year.  Missing values
    are skipped in the means.
    """
    if how == "none":
        return TimeSteps()
    in_base = (np.ones(da.sizes["time"], dtype=bool) if baseline is None
               else in_period(da["time"].values, baseline, "prepare.baseline"))
    if not in_base.any():
        raise UserError(f"prepare.baseline: {baseline} holds no time step of the selected data; "
                        "choose a baseline inside select.period")
    per_year = _steps_per_year(da["time"])
    if how == "mean" or per_year < 1.5:
        keys = np.zeros(da.sizes["time"], dtype=int)
    else:
        keys, which = _calendar_keys(da["time"], per_year)
        if missing := sorted(set(keys) - set(keys[in_base])):
            raise UserError(f"prepare.baseline: {baseline} has no data for {which} {missing[0]}, "
                            "so its climatology is undefined; lengthen the baseline")
    return TimeSteps().then(_minus_group_means, keys=keys, in_base=in_base)


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
