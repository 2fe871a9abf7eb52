"""Periods of a config (``[START, END]``) on a field's own calendar.

A date in a config is ``YYYY``, ``YYYY-MM`` or ``YYYY-MM-DD`` (the schema in
:mod:`climodes.config` checks that it exists in some CF calendar).  A period
runs from the first instant of START to the last instant of END, so
``[1981, 2010]`` holds every step from 1981-01-01 00:00 up to, not including,
2011-01-01 00:00, and ``[2000-02, 2000-02]`` the whole of February.  This is
how pandas reads partial dates in a time slice (common practice), here on every
CF calendar: datetime64 times are the standard (proleptic Gregorian) calendar,
cftime times carry their own (noleap, 360_day, all_leap, julian ...).  A date
that does not exist in the field's calendar (February 30 on a standard
calendar, February 29 on noleap) is an error naming the config key.

>>> import numpy as np
>>> times = np.array(["2000-01-15", "2000-02-15", "2000-03-15"], dtype="datetime64[ns]")
>>> in_period(times, ["2000-02", "2000-03-01"], "select.period")
array([False,  True, False])
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import numpy as np

from climodes.config import date_fields
from climodes.errors import UserError


def in_period(times: np.ndarray, period: list[str], key: str) -> np.ndarray:
    """Which of ``times`` lie in ``period`` (both ends included), in the times' own calendar.

    Parameters
    ----------
    times
        Time coordinate values: numpy datetime64, or cftime dates of one calendar.
    period
        ``[START, END]`` as the schema normalised them.
    key
        The config key the period came from, for error messages.

    Returns
    -------
    numpy.ndarray
        A boolean mask as long as ``times``.

    Raises
    ------
    UserError
        If a date of the period does not exist in the times' calendar, or the times are not dates.
    """
    times = np.asarray(times)
    if times.size == 0:
        return np.zeros(0, dtype=bool)
    if np.issubdtype(times.dtype, np.datetime64):
        start, stop = (_day64(text, key, after=end) for text, end in zip(period, (False, True)))
        days = times.astype("datetime64[D]")  # floors: a step belongs to the day it falls in
        return (days >= start) & (days < stop)
    first = times.flat[0]
    if not hasattr(first, "calendar"):
        raise UserError(f"{key}: the time axis of the input holds {times.dtype} values, not dates; give its "
                        "time variable CF units such as 'days since 1970-01-01'")
    start, stop = (_cftime(text, first, key, after=end) for text, end in zip(period, (False, True)))
    return np.asarray((times >= start) & (times < stop), dtype=bool)


def _missing(text: str, calendar: str, key: str) -> UserError:
    return UserError(f"{key}: {text} does not exist in the input's {calendar} calendar; choose a date of that "
                     "calendar")


def _day64(text: str, key: str, after: bool) -> np.datetime64:
    """The first day of ``text`` in the standard calendar, or with ``after`` the first day after it."""
    fields = date_fields(text)
    try:
        dt.date(*(fields + (1, 1)[len(fields) - 1:]))  # proleptic Gregorian, as numpy's datetime64
    except ValueError:
        raise _missing(text, "standard (Gregorian)", key) from None
    unit = {1: "Y", 2: "M", 3: "D"}[len(fields)]
    instant = np.datetime64(text if len(fields) > 1 else f"{fields[0]:04d}", unit)
    return (instant + int(after)).astype("datetime64[D]")


def _cftime(text: str, like: Any, key: str, after: bool) -> Any:
    """The first instant of ``text`` in the calendar of the cftime date ``like``, or with ``after`` the
    first instant after it."""
    import cftime

    fields = date_fields(text)
    year, month, day = fields + (1, 1)[len(fields) - 1:]
    if after and len(fields) == 1:
        year += 1
    elif after and len(fields) == 2:
        year, month = (year + 1, 1) if month == 12 else (year, month + 1)
    try:
        instant = cftime.datetime(year, month, day, calendar=like.calendar, has_year_zero=like.has_year_zero)
        if after and len(fields) == 3:
            instant += dt.timedelta(days=1)
    except ValueError:
        raise _missing(text, like.calendar, key) from None
    return instant
