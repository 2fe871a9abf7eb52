"""Turn a selected field into the anomalies that are decomposed.

In order: seasonal or annual means, anomalies against a baseline climatology
or mean, a linear trend removed at each point, and standardisation.  Every
function takes and returns a lazy ``(time, lat, lon)`` DataArray; only the time
coordinate is looked at in memory.
"""

from __future__ import annotations

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


def anomalies(da: xr.DataArray, how: str, baseline: list[str] | None) -> xr.DataArray:
    """Subtract the baseline climatology (``"climatology"``) or mean (``"mean"``).

    The climatology is per calendar month for monthly data, per day of year
    for daily data, and the plain mean for one step a year.  Missing values
    are skipped in the means.  It is computed as a product with a (group x
    time) indicator matrix, which keeps the dask graph to a few tasks a chunk.
    """
    if how == "none":
        return da
    base = da if baseline is None else da.sel(time=slice(*baseline))
    if base.sizes["time"] == 0:
        raise UserError(f"prepare.baseline: {baseline} holds no time step of the selected data; "
                        "choose a baseline inside select.period")
    per_year = _steps_per_year(da["time"])
    if how == "mean" or per_year < 1.5:
        return (da - base.mean("time")).assign_attrs(da.attrs)
    keys, which = _calendar_keys(da["time"], per_year)
    base_keys, _ = _calendar_keys(base["time"], per_year)
    groups = np.unique(keys)
    if missing := sorted(set(groups) - set(base_keys)):
        raise UserError(f"prepare.baseline: {baseline} has no data for {which} {missing[0]}, "
                        "so its climatology is undefined; lengthen the baseline")
    indicator = xr.DataArray((base_keys[None, :] == groups[:, None]).astype(da.dtype), dims=("group", "time"),
                             coords={"time": base["time"]})
    totals = xr.dot(indicator, base.fillna(0), dim="time")
    counts = xr.dot(indicator, base.notnull().astype(da.dtype), dim="time")
    climatology = totals / counts.where(counts > 0)
    per_step = climatology.isel(group=xr.DataArray(np.searchsorted(groups, keys), dims="time"))
    per_step = per_step.chunk({"time": da.chunksizes.get("time", -1)}) if da.chunks else per_step
    return (da - per_step.assign_coords(time=da["time"])).assign_attrs(da.attrs)


def detrend_linear(da: xr.DataArray) -> xr.DataArray:
    """Remove the least-squares straight line in time at each point, skipping missing steps."""
    t = xr.DataArray(days_since_start(da["time"]), dims="time", coords={"time": da["time"]})
    t = t.where(da.notnull())
    t_mean = t.mean("time")
    x_mean = da.mean("time")
    slope = ((t - t_mean) * (da - x_mean)).sum("time") / ((t - t_mean) ** 2).sum("time")
    full_t = xr.DataArray(days_since_start(da["time"]), dims="time", coords={"time": da["time"]})
    return (da - (x_mean + slope * (full_t - t_mean))).assign_attrs(da.attrs)


def standardize(da: xr.DataArray) -> xr.DataArray:
    """Divide each point by its standard deviation in time; constant points become missing."""
    std = da.std("time", ddof=1)
    out = da / std.where(std > 0)
    return out.assign_attrs({**da.attrs, "units": "1"})


def prepare(da: xr.DataArray, spec: PrepareSection, months: list[int] | None, notes: list[str]) -> xr.DataArray:
    """Apply every preparation step of ``spec`` to the selected field, lazily."""
    da = aggregate(da, spec.aggregate, months, notes)
    da = anomalies(da, spec.anomalies, spec.baseline)
    if spec.detrend == "linear":
        da = detrend_linear(da)
    if spec.standardize:
        da = standardize(da)
    return da
