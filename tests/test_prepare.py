"""Seasonal means, climatologies, detrending and standardising on hand-computed examples."""

import cftime
import dask.array as da_
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from climodes.config import PrepareSection
from climodes.errors import UserError
from climodes.prepare import (
    aggregate,
    anomalies,
    days_since_start,
    detrend_linear,
    prepare,
    season_years,
    standardize,
    time_steps,
)


def _monthly(values: np.ndarray, start: str = "1990-01-01") -> xr.DataArray:
    time = pd.date_range(start, periods=len(values), freq="MS") + pd.Timedelta(days=14)
    data = np.asarray(values, dtype=float)[:, None, None] * np.ones((1, 2, 3))
    return xr.DataArray(da_.from_array(data, chunks=(7, 2, 3)), dims=("time", "lat", "lon"),
                        coords={"time": time, "lat": [0.0, 10.0], "lon": [0.0, 10.0, 20.0]})


def test_winter_means_count_december_with_the_following_year():
    """Common practice: DJF belongs to the year of its January; incomplete winters are dropped."""
    field = _monthly(np.arange(36))  # Jan 1990 .. Dec 1992, value = months since Jan 1990
    notes = []
    winters = aggregate(field.isel(time=np.isin(field["time.month"], [12, 1, 2])), "seasonal", [12, 1, 2], notes)
    # winter 1991: Dec 1990 (11), Jan 1991 (12), Feb 1991 (13) -> 12; winter 1992: 23, 24, 25 -> 24
    np.testing.assert_allclose(winters.values[:, 0, 0], [12.0, 24.0])
    assert [str(t)[:7] for t in winters["time"].values] == ["1991-01", "1992-01"]
    # winter 1990 lacks December 1989, winter 1993 has only December 1992
    assert "1990 (no data for month 12)" in notes[0] and "1993 (no data for month 1, 2)" in notes[0]


def test_season_years_without_a_year_turn():
    time = xr.DataArray(pd.date_range("2000-06-01", periods=3, freq="MS"), dims="time")
    assert season_years(time, [6, 7, 8]).tolist() == [2000, 2000, 2000]
    assert season_years(time, [11, 12, 1, 2, 6, 7, 8]).tolist() == [2000, 2000, 2000]


def test_annual_means_need_every_month():
    field = _monthly(np.arange(30))  # 1990 complete, 1991 complete, 1992 only Jan-Jun
    notes = []
    years = aggregate(field, "annual", None, notes)
    np.testing.assert_allclose(years.values[:, 0, 0], [5.5, 17.5])  # mean of 0..11 and of 12..23
    assert "1992" in notes[0]


def test_monthly_climatology_and_baseline():
    """Hand-computed: value = month + 100 * year index."""
    month = np.tile(np.arange(1, 13), 2)
    field = _monthly(month + 100.0 * np.repeat([0, 1], 12))
    both = anomalies(field, "climatology", None)
    np.testing.assert_allclose(both.values[:, 0, 0], np.repeat([-50.0, 50.0], 12))
    first_year = anomalies(field, "climatology", ["1990", "1990"])
    np.testing.assert_allclose(first_year.values[:, 0, 0], np.repeat([0.0, 100.0], 12))
    mean_only = anomalies(field, "mean", None)
    np.testing.assert_allclose(mean_only.values[:, 0, 0], field.values[:, 0, 0] - field.values[:, 0, 0].mean())


def test_climatology_skips_missing_values_and_keeps_dask_lazy():
    values = np.tile(np.arange(1.0, 13.0), 3)
    field = _monthly(values).copy()
    field[5, 0, 0] = np.nan  # June 1990 missing at one point
    field = field.chunk({"time": 7})
    out = anomalies(field, "climatology", None)
    assert isinstance(out.data, da_.Array)
    result = out.values
    assert np.isnan(result[5, 0, 0]) and np.allclose(np.delete(result[:, 0, 0], 5), 0)


def test_climatology_on_a_noleap_calendar():
    time = xr.date_range("2001-01-16", periods=24, freq="MS", calendar="noleap", use_cftime=True)
    field = xr.DataArray(np.tile(np.arange(12.0), 2)[:, None, None], dims=("time", "lat", "lon"),
                         coords={"time": time, "lat": [0.0], "lon": [0.0]})
    assert isinstance(field["time"].values[0], cftime.DatetimeNoLeap)
    np.testing.assert_allclose(anomalies(field, "climatology", None).values, 0)


def test_baseline_without_some_month_is_an_error():
    field = _monthly(np.arange(24.0)).isel(time=slice(0, 18))
    with pytest.raises(UserError, match="prepare.baseline"):
        anomalies(field, "climatology", ["1990-01", "1990-06"])


def test_linear_detrend_is_the_least_squares_line_in_days():
    """Reference: numpy.polyfit of degree 1 against the time in days (months differ in length)."""
    field = _monthly(np.zeros(48))
    days = days_since_start(field["time"])
    values = 3.0 + 0.01 * days + np.sin(2 * np.pi * days / 365.25)
    field = _monthly(values)
    field[10, 1, 1] = np.nan  # a missing step is skipped in that point's fit
    out = detrend_linear(field).values
    np.testing.assert_allclose(out[:, 0, 0], values - np.polyval(np.polyfit(days, values, 1), days), atol=1e-10)
    ok = np.arange(48) != 10
    fit = np.polyfit(days[ok], values[ok], 1)
    np.testing.assert_allclose(out[ok, 1, 1], values[ok] - np.polyval(fit, days[ok]), atol=1e-10)
    assert np.isnan(out[10, 1, 1])


def test_standardize_gives_unit_variance_and_drops_constant_points():
    field = _monthly(np.arange(24.0) % 5).copy()
    field[:, 1, 2] = 7.0
    out = standardize(field).values
    np.testing.assert_allclose(np.std(out[:, 0, 0], ddof=1), 1.0)
    assert np.all(np.isnan(out[:, 1, 2]))


def test_prepare_applies_the_steps_in_order():
    days = days_since_start(_monthly(np.zeros(48))["time"])
    field = _monthly(4.0 + 0.02 * days)
    out = prepare(field, PrepareSection(anomalies="mean", detrend="linear"), None, [])
    np.testing.assert_allclose(out.values, 0, atol=1e-9)  # a mean and a trend are all there was
    scaled = prepare(_monthly(np.arange(48.0) % 7), PrepareSection(anomalies="mean", standardize=True), None, [])
    np.testing.assert_allclose(scaled.std("time", ddof=1).values, 1.0)
    assert scaled.attrs["units"] == "1"


# --- seasonal means at points with missing months, calendar keys of daily and sub-monthly data


def test_a_season_missing_a_month_at_a_point_is_missing_there():
    """Hand-computed: a winter mean needs all three months at a point; the other points keep theirs."""
    field = _monthly(np.arange(36.0)).copy()
    field[12, 0, 0] = np.nan  # January 1991 missing at one point
    winters = aggregate(field.isel(time=np.isin(field["time.month"], [12, 1, 2])), "seasonal", [12, 1, 2], [])
    assert isinstance(winters.data, da_.Array)  # still lazy
    values = winters.values
    assert np.isnan(values[0, 0, 0]) and values[1, 0, 0] == 24.0
    np.testing.assert_allclose(values[:, 1, 2], [12.0, 24.0])


def test_means_of_a_field_in_many_chunks_stay_in_blocks_no_bigger():
    """The means need every step of a point in one block; joining the time chunks must not make the
    blocks bigger than the chunks planned (the streaming solvers size their blocks by compute.memory)."""
    field = _monthly(np.arange(120.0)).chunk({"time": 40, "lat": 1})  # e.g. three files of 40 steps
    years = aggregate(field, "annual", None, [])
    assert years.data.chunks[0] == (10,) and max(years.data.chunks[1]) == 1
    np.testing.assert_allclose(years.values[:, 1, 2], np.arange(10) * 12 + 5.5)


def test_a_daily_season_is_missing_only_where_a_whole_month_is():
    """Daily steps: a winter mean is of the days present, and missing where a month has no day at all."""
    time = pd.date_range("1990-12-01", "1991-02-28", freq="D")
    values = np.arange(time.size, dtype=float)[:, None, None] * np.ones((1, 1, 3))
    values[:10, 0, 1] = np.nan  # ten December days missing: the other 80 days make the mean
    values[31:62, 0, 2] = np.nan  # all of January missing: no winter mean
    field = xr.DataArray(values, dims=("time", "lat", "lon"), coords={"time": time, "lat": [0.0], "lon": [0.0, 1, 2]})
    winter = aggregate(field, "seasonal", [12, 1, 2], []).values[0, 0]
    np.testing.assert_allclose(winter[:2], [values[:, 0, 0].mean(), values[10:, 0, 1].mean()])
    assert np.isnan(winter[2])


def test_a_point_missing_half_its_months_drops_out_instead_of_aliasing_the_seasonal_cycle():
    """Before, an annual mean of the months that remained carried the seasonal cycle (mode 1, 95 %); now the
    point's incomplete years are missing, so the max_missing rule drops it and counts it."""
    from climodes.solvers import solve
    from climodes.weights import area_weights

    rng = np.random.default_rng(4)
    time = pd.date_range("1981-01-15", periods=360, freq="MS")
    season = 15 * np.cos(2 * np.pi * (time.month.values - 1) / 12)[:, None, None]
    values = season + rng.standard_normal((360, 4, 5))
    gappy_years = rng.choice(30, 12, replace=False)  # 40 % of the years lose half their months at one point
    values[(np.isin(np.arange(360) // 12, gappy_years)) & (rng.random(360) < 0.5), 2, 3] = np.nan
    field = xr.DataArray(values, dims=("time", "lat", "lon"),
                         coords={"time": time, "lat": np.linspace(-30, 30, 4), "lon": np.arange(0, 50.0, 10)})
    years = aggregate(field, "annual", None, [])
    weights = area_weights(years["lat"], years["lon"], "coslat")
    modes, _, counts = solve(years, weights, 2, 0.1)
    assert counts.too_often_missing == 1 and counts.used == 19
    without = solve(years.where((years["lat"] != years["lat"][2]) | (years["lon"] != years["lon"][3])), weights, 2, 0.1)
    np.testing.assert_allclose(modes["eigenvalue"], without[0]["eigenvalue"], rtol=1e-12)
    assert float(modes["variance_explained"][0]) < 0.3  # noise: no mode stands out


def _daily(time, seed: int = 0) -> xr.DataArray:
    """A seasonal cycle by day of the year plus noise at 2 x 3 points."""
    rng = np.random.default_rng(seed)
    phase = 2 * np.pi * xr.DataArray(time, dims="time").dt.dayofyear.values / 365.0
    values = 10 * np.cos(phase)[:, None, None] + rng.standard_normal((len(time), 2, 3))
    return xr.DataArray(values, dims=("time", "lat", "lon"), coords={"time": time, "lat": [0.0, 5], "lon": [0.0, 5, 10]})


def _pandas_daily_anomalies(field: xr.DataArray, baseline: slice) -> np.ndarray:
    """Reference (pandas groupby): anomalies against the mean of each calendar month and day over the
    baseline, 29 February counted with 28 February (the rule climodes states)."""
    index = field.indexes["time"]
    key = pd.Series(100 * index.month + index.day).replace(229, 228).to_numpy()
    table = pd.DataFrame(field.values.reshape(len(index), -1), index=index)
    in_base = (index >= pd.Timestamp(baseline.start)) & (index <= pd.Timestamp(baseline.stop))
    climatology = table[in_base].groupby(key[in_base]).mean()
    return (table.to_numpy() - climatology.loc[key].to_numpy()).reshape(field.shape)


@pytest.mark.parametrize("baseline", [slice("2000-01-01", "2003-12-31"), slice("2001-01-01", "2003-12-31")],
                         ids=["baseline with a leap year", "baseline without a leap year"])
def test_daily_climatology_by_calendar_month_and_day(baseline):
    """Against pandas: every day of a leap year is compared with its own calendar day (1 March with
    1 March, 31 December with every 31 December), and 29 February with 28 February."""
    field = _daily(pd.date_range("2000-01-01", "2005-12-31", freq="D"))
    out = anomalies(field, "climatology", [baseline.start, baseline.stop]).values
    np.testing.assert_allclose(out, _pandas_daily_anomalies(field, baseline), atol=1e-12)


@pytest.mark.parametrize("calendar, days", [("noleap", 365), ("360_day", 360), ("all_leap", 366)])
def test_daily_climatology_on_model_calendars(calendar, days):
    """Against xarray's own groupby by (month, day): on these calendars every calendar day is a key of its
    own, 29 and 30 February of 360_day and 29 February of all_leap included."""
    time = xr.date_range("2001-01-01", periods=4 * days, freq="D", calendar=calendar, use_cftime=True)
    field = _daily(time)
    key = field["time"].dt.month * 100 + field["time"].dt.day
    base = field["time"].dt.year <= 2003
    climatology = field.where(base, drop=True).groupby(key.where(base, drop=True).rename("key")).mean()
    reference = field.groupby(key.rename("key")) - climatology
    assert climatology.sizes["key"] == days
    np.testing.assert_allclose(anomalies(field, "climatology", ["2001", "2003"]).values,
                               reference.transpose("time", "lat", "lon").values, atol=1e-12)


def test_pentads_get_a_climatology_of_bins_of_the_year():
    """40 years of pentads: a seasonal cycle plus unit-variance noise.  Anomalies against 73 bins of the
    year keep the noise variance: each bin holds one step a year, so the mean removes 1/40 of it (common
    practice: a sample mean of n values takes 1/n of the variance with it), and the cycle left inside a
    5-day bin adds about 3 % (by hand: slope^2 * 5^2/12).  Keyed by calendar day instead (8 steps a key
    over 40 years) the anomalies lose 12 % of it."""
    time = pd.date_range("1980-01-03", periods=40 * 73, freq="5D")
    rng = np.random.default_rng(7)
    phase = 2 * np.pi * (time.day_of_year.values - 1) / 365.25
    noise = rng.standard_normal((time.size, 3, 4))
    values = (10 * np.cos(phase) + 4 * np.sin(2 * phase))[:, None, None] + noise
    field = xr.DataArray(values, dims=("time", "lat", "lon"),
                         coords={"time": time, "lat": [0.0, 5, 10], "lon": [0.0, 5, 10, 15]})
    out = anomalies(field, "climatology", None).values
    assert abs(out.var() / noise.var() - 1) < 0.05
    # reference (pandas groupby) of the same binning: floor(73 * the fraction of the year elapsed)
    elapsed = (time.day_of_year.values - 1 + time.hour.values / 24) / np.where(time.is_leap_year, 366, 365)
    key = np.floor(73 * elapsed + 1e-9).astype(int)
    table = pd.DataFrame(values.reshape(time.size, -1))
    reference = table - table.groupby(key).transform("mean")
    assert np.bincount(key).min() >= 36
    np.testing.assert_allclose(out.reshape(time.size, -1), reference.to_numpy(), atol=1e-12)


@pytest.mark.parametrize("freq, rule", [("MS", "month"), ("D", "month_day"), ("6h", "month_day"),
                                        ("5D", "bins73"), ("7D", "bins52"), ("YS", "yearly")])
def test_key_rule_follows_the_spacing(freq, rule):
    from climodes.prepare import key_rule

    time = xr.DataArray(pd.date_range("1990-01-01", periods=30, freq=freq), dims="time")
    assert key_rule(time) == rule


def test_a_baseline_missing_a_calendar_day_names_it():
    field = _daily(pd.date_range("2001-01-01", "2002-12-31", freq="D")).isel(time=slice(0, 700))
    with pytest.raises(UserError, match=r"prepare.baseline: \['2001', '2001-11'\] has no data for day 12-01"):
        anomalies(field, "climatology", ["2001", "2001-11"])


# --- the preparation as fit and apply: what a run stores, checked against plain pandas and numpy


def _gappy_monthly(years: int = 12, seed: int = 3) -> xr.DataArray:
    """A seasonal cycle, a trend and noise at 3 x 4 points, with a few missing values at one point."""
    rng = np.random.default_rng(seed)
    time = pd.date_range("1990-01-01", periods=12 * years, freq="MS") + pd.Timedelta(days=14)
    season = 8 * np.cos(2 * np.pi * (time.month.values - 1) / 12)
    trend = 0.003 * np.arange(time.size)
    values = 280 + (season + trend)[:, None, None] * rng.uniform(0.5, 1.5, (1, 3, 4)) + rng.standard_normal(
        (time.size, 3, 4))
    values[[5, 40, 77], 1, 2] = np.nan
    return xr.DataArray(values, dims=("time", "lat", "lon"), attrs={"units": "K"},
                        coords={"time": time, "lat": [-10.0, 0, 10], "lon": [0.0, 10, 20, 30]})


def _solved(field: xr.DataArray, spec: PrepareSection) -> tuple[xr.DataArray, xr.Dataset]:
    from climodes.solvers import solve
    from climodes.weights import area_weights

    field, steps = time_steps(field, spec, None, [])
    return field, solve(field, area_weights(field["lat"], field["lon"], "coslat"), 2, spec.max_missing, steps=steps)[0]


def _pandas_climatology(field: xr.DataArray, key: np.ndarray, in_base: np.ndarray) -> pd.DataFrame:
    """Reference (pandas groupby): the mean over the baseline steps of each key, NaN skipped."""
    table = pd.DataFrame(field.values.reshape(field.sizes["time"], -1))
    return table[in_base].groupby(key[in_base]).mean()


def test_the_stored_monthly_climatology_is_a_pandas_groupby_of_the_baseline():
    field, modes = _solved(_gappy_monthly(), PrepareSection(baseline=["1992", "1997"]))
    index = field.indexes["time"]
    reference = _pandas_climatology(field, index.month.to_numpy(), (index.year >= 1992) & (index.year <= 1997))
    stored = modes["fitted_climatology"]
    assert stored.dims == ("calendar_key", "lat", "lon") and stored.attrs["key_rule"] == "month"
    assert stored["calendar_key"].values.tolist() == reference.index.tolist() == list(range(1, 13))
    np.testing.assert_allclose(stored.values.reshape(12, -1), reference.to_numpy(), rtol=1e-14)


def test_the_stored_daily_climatology_is_a_pandas_groupby_by_month_and_day():
    field = _daily(pd.date_range("2000-01-01", "2003-12-31", freq="D"))
    field, modes = _solved(field, PrepareSection())
    index = field.indexes["time"]
    key = pd.Series(100 * index.month + index.day).replace(229, 228).to_numpy()  # the stated rule for 29 Feb
    reference = _pandas_climatology(field, key, np.ones(index.size, dtype=bool))
    stored = modes["fitted_climatology"]
    assert stored.attrs["key_rule"] == "month_day" and stored.sizes["calendar_key"] == 365
    assert stored["calendar_key"].values.tolist() == reference.index.tolist()
    np.testing.assert_allclose(stored.values.reshape(365, -1), reference.to_numpy(), rtol=1e-13)


def test_the_stored_trend_is_numpy_polyfit_of_the_anomalies():
    """Reference: numpy.polyfit of degree 1 of the pandas anomalies against days since the first step,
    the gappy point on its valid steps only; then the scale is numpy's std (ddof=1) of what remains."""
    field, modes = _solved(_gappy_monthly(), PrepareSection(detrend="linear", standardize=True))
    index = field.indexes["time"]
    climatology = _pandas_climatology(field, index.month.to_numpy(), np.ones(index.size, dtype=bool))
    anomalies = field.values.reshape(index.size, -1) - climatology.loc[index.month].to_numpy()
    days = (index - index[0]) / pd.Timedelta(days=1)
    slope, intercept, scale = (modes[name].values.reshape(-1) for name in
                               ("fitted_trend_slope", "fitted_trend_intercept", "fitted_scale"))
    for point in range(12):
        ok = ~np.isnan(anomalies[:, point])
        fit = np.polyfit(days[ok], anomalies[ok, point], 1)
        np.testing.assert_allclose([slope[point], intercept[point]], fit, rtol=1e-9, atol=1e-12)
        rest = anomalies[ok, point] - np.polyval(fit, days[ok])
        np.testing.assert_allclose(scale[point], np.std(rest, ddof=1), rtol=1e-12)
    assert modes["fitted_trend_slope"].attrs["time_origin"] == str(index[0].isoformat())
    assert modes["fitted_trend_slope"].attrs["units"] == "K day-1"


def test_the_stored_offset_centres_every_series_with_its_gaps_as_zero_anomalies():
    """The missing-data rule (README, prepare.max_missing): a missing anomaly is set to zero, then each
    point's time mean is removed, so every column decomposed has zero mean (common practice for EOFs).
    Reference: pandas anomalies against a baseline climatology, NaN filled with 0, their mean."""
    from climodes.prepare import apply, fitted_preparation, keys_of

    field, modes = _solved(_gappy_monthly(), PrepareSection(baseline=["1990", "1993"]))
    index = field.indexes["time"]
    in_base = index.year <= 1993
    climatology = _pandas_climatology(field, index.month.to_numpy(), in_base)
    anomalies = pd.DataFrame(field.values.reshape(index.size, -1) - climatology.loc[index.month].to_numpy())
    np.testing.assert_allclose(modes["fitted_offset"].values.reshape(-1), anomalies.fillna(0).mean(), rtol=1e-12)
    fitted = fitted_preparation(modes)
    centred = apply(field.values, fitted, keys_of(field["time"], fitted))
    np.testing.assert_allclose(centred.mean(axis=0), 0, atol=1e-12)
    assert abs(modes["fitted_offset"].values[1, 2]) > 0.1  # a later period is warmer than the baseline


@pytest.mark.parametrize("spec", [PrepareSection(), PrepareSection(baseline=["1991", "1995"], detrend="linear"),
                                  PrepareSection(anomalies="mean", standardize=True),
                                  PrepareSection(anomalies="none", detrend="linear")],
                         ids=["climatology", "baseline and trend", "mean and scale", "trend alone"])
def test_unapply_undoes_apply(spec):
    """unapply(apply(x)) == x wherever x has a value; a missing value comes back as its step's climatology
    and trend (by hand: the zero anomaly it was set to, undone)."""
    from climodes.prepare import apply, fit, keys_of, unapply

    raw = _gappy_monthly()
    field, steps = time_steps(raw, spec, None, [])
    values = field.values.reshape(field.sizes["time"], -1)
    fitted = fit(values, steps)
    keys = keys_of(field["time"], fitted)
    back = unapply(apply(values, fitted, keys), fitted, keys)
    valid = ~np.isnan(values)
    np.testing.assert_allclose(back[valid], values[valid], rtol=1e-14)
    q = fitted.quantities
    expected = (q["climatology"][keys.index] if "climatology" in q else 0) + (
        q["intercept"] + q["slope"] * keys.days[:, None] if "slope" in q else 0)
    np.testing.assert_allclose(back[~valid], (expected * np.ones_like(values))[~valid], rtol=1e-14)


def test_a_field_keyed_otherwise_is_refused():
    from climodes.prepare import fit, keys_of

    field, steps = time_steps(_gappy_monthly().isel(time=np.flatnonzero(_gappy_monthly()["time.month"] < 7)),
                              PrepareSection(detrend="linear"), None, [])
    fitted = fit(field.values, steps)
    daily = xr.DataArray(pd.date_range("2010-01-01", periods=60, freq="D"), dims="time")
    with pytest.raises(UserError, match="keyed by calendar month and day, but the climatology was fitted by "
                                        "calendar month"):
        keys_of(daily, fitted)
    noleap = xr.DataArray(xr.date_range("2010-01-15", periods=6, freq="MS", calendar="noleap", use_cftime=True),
                          dims="time")
    with pytest.raises(UserError, match="the field's calendar is noleap, but the preparation was fitted on the "
                                        "proleptic_gregorian calendar"):
        keys_of(noleap, fitted)
    summer = xr.DataArray(pd.date_range("2010-05-01", periods=4, freq="MS"), dims="time")
    with pytest.raises(UserError, match="2010-07-01T00:00:00 falls on month 7, which the fitted climatology does not"):
        keys_of(summer, fitted)


def test_a_results_file_without_a_fit_is_refused():
    from climodes.prepare import fitted_preparation

    bare = xr.Dataset({"eof": (("mode", "lat", "lon"), np.ones((1, 2, 2)))})
    with pytest.raises(UserError, match="holds no fitted preparation"):
        fitted_preparation(bare)
    with pytest.raises(UserError, match="fitted_offset says the steps climatology ran, but fitted_climatology"):
        fitted_preparation(bare.assign(fitted_offset=(("lat", "lon"), np.zeros((2, 2)),
                                                      {"preparation_steps": "climatology offset"})))


def test_the_examples_in_the_module_hold():
    import doctest

    import climodes.prepare

    assert doctest.testmod(climodes.prepare).failed == 0


@pytest.mark.parametrize("baseline, said", [
    (["1981", "1992"], "the data cover 3 of its 12 years (1990 to 1992)"),
    (["1991", "1995"], "the data cover 2 of its 5 years (1991 to 1992)"),
    (["1990", "1992"], None),
    (["1991-01", "1991-12"], None),
])
def test_a_baseline_the_data_cover_only_in_part_is_noted(baseline, said):
    """Common practice: a climatology of fewer years than the baseline named is a different climatology; the
    run says of how many years it is, and nothing when the data cover the whole baseline."""
    field = _monthly(np.arange(36.0))  # 1990 to 1992
    notes: list[str] = []
    time_steps(field, PrepareSection(anomalies="climatology", baseline=baseline), None, notes)
    found = [note for note in notes if note.startswith("prepare.baseline")]
    assert found == ([] if said is None else [f"prepare.baseline {baseline[0]} to {baseline[1]}: {said}, so the "
                                              "climatology is of those years only"])


@pytest.mark.parametrize("gap", [False, True])
def test_centring_sets_gaps_to_zero_anomaly_in_a_new_array(gap):
    """The missing-data rule (README, prepare.max_missing), by hand: a missing value becomes zero
    anomaly, then each column's mean (gaps counted as zero) is removed; the input is left as it was."""
    from climodes.prepare import centre

    values = np.array([[1.0, 2.0], [3.0, np.nan if gap else 4.0], [5.0, 6.0]], dtype=np.float32)
    before = values.copy()
    centred, offset = centre(values)
    second = [2.0, 0.0, 6.0] if gap else [2.0, 4.0, 6.0]
    np.testing.assert_allclose(offset, [3.0, np.mean(second)])
    np.testing.assert_allclose(centred, np.column_stack([[-2.0, 0.0, 2.0], np.subtract(second, np.mean(second))]),
                               rtol=1e-6)
    np.testing.assert_array_equal(values, before)
    assert centred.dtype == np.float32 and not np.shares_memory(centred, values)


def test_a_calendar_refusal_names_the_calendar_the_file_states():
    """A field whose file says ``calendar = "standard"`` decodes to numpy dates, which xarray calls
    proleptic_gregorian (the two differ only before 1582-10-15, CF conventions 4.4.1); refused against a
    noleap fit, the message names the calendar as the file states it."""
    from climodes.prepare import Fitted, Preparation, keys_of

    time = xr.DataArray(pd.date_range("2000-01-01", periods=24, freq="MS"), dims="time", name="time")
    time.encoding["calendar"] = "standard"
    fitted = Fitted(Preparation(("climatology",), "month", tuple(range(1, 13)), "", "noleap"), {})
    with pytest.raises(UserError, match="the field's calendar is standard, but the preparation was fitted on the "
                                        "noleap calendar"):
        keys_of(time, fitted)
