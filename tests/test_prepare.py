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
