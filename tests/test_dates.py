"""Periods on a field's own calendar, checked against pandas and xarray's partial-date slicing."""

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from climodes.dates import in_period
from climodes.errors import UserError

CFTIME_CALENDARS = ["noleap", "360_day", "all_leap", "julian", "proleptic_gregorian"]


def _date_text(year: int, month: int, day: int, resolution: int) -> str:
    return "-".join([f"{year:04d}", f"{month:02d}", f"{day:02d}"][:resolution])


@st.composite
def _periods(draw, first_year: int, last_year: int, most_days: int = 28):
    """[START, END] as YYYY, YYYY-MM or YYYY-MM-DD texts that exist in every calendar, START's first day
    not after END's last."""
    def one():
        return (draw(st.integers(first_year, last_year)), draw(st.integers(1, 12)), draw(st.integers(1, most_days)),
                draw(st.integers(1, 3)))

    a, b = sorted([one(), one()])
    return [_date_text(*a), _date_text(*b)]


@settings(max_examples=300, deadline=None)
@given(freq=st.sampled_from(["6h", "D", "5D", "MS", "QS"]), offset_hours=st.integers(0, 23),
       period=_periods(1998, 2003))
def test_standard_calendar_selects_what_pandas_partial_strings_select(freq, offset_hours, period):
    # Reference: pandas partial-string slicing of a DatetimeIndex (`series.loc["1999":"2000-02"]`), which
    # takes every stamp from the first instant of START through the last instant of END.
    times = pd.date_range("1998-06-01", "2003-06-30", freq=freq) + pd.Timedelta(hours=offset_hours)
    series = pd.Series(np.arange(times.size), index=times)
    expected = series.loc[period[0]:period[1]].to_numpy()
    assert np.array_equal(np.flatnonzero(in_period(times.values, period, "select.period")), expected)


@pytest.mark.parametrize("calendar", CFTIME_CALENDARS)
@settings(max_examples=60, deadline=None)
@given(freq=st.sampled_from(["D", "5D", "MS"]), period=_periods(1999, 2002))
def test_other_calendars_select_what_xarray_partial_strings_select(calendar, freq, period):
    # Reference: xarray's CFTimeIndex partial-date slicing (`da.sel(time=slice("1999", "2000-02"))`), the
    # general-purpose implementation of the same reading of a partial date on cftime calendars.
    times = xr.date_range("1998-12-01", "2002-12-30", freq=freq, calendar=calendar, use_cftime=True)
    series = xr.DataArray(np.arange(times.size), dims="time", coords={"time": times})
    expected = series.sel(time=slice(*period)).values
    assert np.array_equal(np.flatnonzero(in_period(series["time"].values, period, "select.period")), expected)


def _daily(calendar: str, start: str = "2001-01-01", periods: int = 730):
    return xr.date_range(start, periods=periods, freq="D", calendar=calendar, use_cftime=True).values


@pytest.mark.parametrize("calendar, month_days", [
    # Days of February 2001 and of January in each calendar (the CF conventions, section 4.4.1).
    ("noleap", (28, 31)), ("all_leap", (29, 31)), ("360_day", (30, 30)), ("julian", (28, 31)),
])
def test_a_whole_month_is_every_day_of_that_month_in_the_calendar(calendar, month_days):
    times = _daily(calendar)
    assert in_period(times, ["2001-02", "2001-02"], "select.period").sum() == month_days[0]
    assert in_period(times, ["2001-01", "2001-01"], "select.period").sum() == month_days[1]
    # a year is 365, 366 or 360 days
    assert in_period(times, ["2001", "2001"], "select.period").sum() == {"noleap": 365, "all_leap": 366,
                                                                        "360_day": 360, "julian": 365}[calendar]


def test_the_last_day_of_end_is_kept_whole():
    times = np.arange("2000-02-28T00", "2000-03-02T00", np.timedelta64(6, "h"), dtype="datetime64[h]")
    mask = in_period(times.astype("datetime64[ns]"), ["2000-02-28", "2000-02-29"], "select.period")
    assert mask.sum() == 8 and mask[:8].all()  # 2000 is a leap year (Gregorian rule): 28 and 29 Feb, 4 steps each


@pytest.mark.parametrize("calendar, date", [
    ("noleap", "2001-02-29"), ("noleap", "2004-02-29"), ("360_day", "2001-01-31"), ("all_leap", "2001-02-30"),
    ("julian", "2001-02-29"), ("standard", "1582-10-10"),  # the ten days the Gregorian reform skipped
])
def test_a_date_missing_from_the_calendar_is_refused(calendar, date):
    times = _daily(calendar, "1580-01-01" if calendar == "standard" else "2001-01-01")
    with pytest.raises(UserError, match=f"^prepare.baseline: {date} does not exist in the input's {calendar} "
                                        "calendar"):
        in_period(times, [date, "2005"], "prepare.baseline")
    with pytest.raises(UserError, match=f"^select.period: {date} does not exist"):
        in_period(times, ["1500", date], "select.period")


@pytest.mark.parametrize("date", ["2001-02-29", "1900-02-29", "2000-02-30", "2001-04-31"])
def test_dates_that_the_gregorian_calendar_lacks_are_refused_on_datetime64(date):
    times = pd.date_range("1890-01-01", periods=50, freq="YS").values
    with pytest.raises(UserError, match=f"select.period: {date} does not exist in the input's standard"):
        in_period(times, [date, "2010"], "select.period")


def test_leap_days_exist_where_the_calendar_has_them():
    assert in_period(_daily("all_leap"), ["2001-02-29", "2001-02-29"], "k").sum() == 1
    assert in_period(_daily("360_day"), ["2001-02-30", "2001-02-30"], "k").sum() == 1
    assert in_period(_daily("julian", "1900-01-01"), ["1900-02-29", "1900-02-29"], "k").sum() == 1  # Julian rule
    days = pd.date_range("2000-01-01", periods=800, freq="D").values
    assert in_period(days, ["2000-02-29", "2000-02-29"], "k").sum() == 1


def test_years_far_from_the_data_and_at_the_ends_of_the_range():
    days = pd.date_range("2000-01-01", periods=10, freq="D").values
    assert in_period(days, ["0001", "9999"], "k").all()  # the stop, 10000-01-01, is beyond datetime64[ns]
    assert not in_period(_daily("noleap"), ["9999-12-31", "9999-12-31"], "k").any()
    assert in_period(np.array([], dtype="datetime64[ns]"), ["2000", "2001"], "k").size == 0


def test_a_time_axis_of_plain_numbers_is_named():
    with pytest.raises(UserError, match="select.period: the time axis of the input holds float64 values, not dates"):
        in_period(np.arange(5.0), ["2000", "2001"], "select.period")
