"""What archives hold: CF calendars (cftime), stamps at the start, middle or end of the month with and
without CF time bounds, packed integers (CF scale_factor/add_offset, _FillValue, missing_value), gaps."""

import datetime as dt

import netCDF4
import numpy as np
import pytest
import xarray as xr

from climodes.config import InputSection, SelectSection
from climodes.fields import open_field, select
from conftest import red_field, write_config

CALENDARS = ["standard", "proleptic_gregorian", "noleap", "365_day", "360_day", "all_leap"]


def _monthly_file(path, calendar, stamp, bounds, months=36):
    """Field value = the calendar month of the interval (1..12), plus a little signal."""
    starts = xr.date_range("2000-01-01", periods=months + 1, freq="MS", calendar=calendar, use_cftime=True)
    lower, upper = np.array(starts[:-1]), np.array(starts[1:])
    stamps = {"start": lower, "middle": np.array([a + (b - a) / 2 for a, b in zip(lower, upper)]),
              "end": upper if bounds else np.array([b - dt.timedelta(days=1) for b in upper])}[stamp]
    lat, lon = np.linspace(-40, 40, 5), np.arange(0, 60.0, 10)
    values = np.array([t.month for t in lower], float)[:, None, None] + 0.01 * red_field((months, 5, 6))
    units = "days since 2000-01-01"
    with netCDF4.Dataset(path, "w") as nc:
        nc.createDimension("time", months)
        nc.createDimension("nv", 2)
        nc.createDimension("lat", 5)
        nc.createDimension("lon", 6)
        t = nc.createVariable("time", "f8", ("time",))
        t.units, t.calendar, t.standard_name = units, calendar, "time"
        t[:] = netCDF4.date2num(list(stamps), units, calendar)
        if bounds:
            t.bounds = "time_bnds"
            b = nc.createVariable("time_bnds", "f8", ("time", "nv"))
            b[:] = np.column_stack([netCDF4.date2num(list(lower), units, calendar),
                                    netCDF4.date2num(list(upper), units, calendar)])
        for name, vals, u in (("lat", lat, "degrees_north"), ("lon", lon, "degrees_east")):
            v = nc.createVariable(name, "f8", (name,))
            v.units = u
            v[:] = vals
        f = nc.createVariable("tas", "f4", ("time", "lat", "lon"))
        f.units = "K"
        f[:] = values
    return path


@pytest.mark.parametrize("calendar", CALENDARS)
@pytest.mark.parametrize("stamp", ["start", "middle", "end"])
@pytest.mark.parametrize("bounds", [True, False])
def test_months_are_the_right_months(tmp_path, calendar, stamp, bounds):
    path = _monthly_file(tmp_path / "f.nc", calendar, stamp, bounds)
    opened = open_field(InputSection(paths=[str(path)], variable="tas"))
    januaries = select(opened, SelectSection(months=[1])).values
    assert januaries.shape[0] == 3
    np.testing.assert_allclose(np.round(januaries), 1)
    assert ("time stamps moved to the middles of the files' time bounds" in opened.notes) == (
        bounds and stamp != "middle")


@pytest.mark.parametrize("calendar", ["noleap", "360_day", "all_leap"])
def test_a_run_keeps_the_calendar(tmp_path, cli, calendar):
    path = _monthly_file(tmp_path / "f.nc", calendar, "middle", True)
    code, _, err = cli("run", write_config(tmp_path, [path], modes={"count": 2}))
    assert code == 0, err
    with netCDF4.Dataset(tmp_path / "out" / "modes.nc") as nc:
        assert nc["time"].calendar == calendar and nc["time"].units == "days since 2000-01-01"


def test_packed_integers_decode_like_floats(tmp_path, cli):
    lat, lon = np.linspace(-40, 40, 9), np.arange(0, 90.0, 10)
    values = 280 + red_field((48, 9, 9), 6)
    values[:, 0, 0] = np.nan
    time = xr.date_range("2000-01-01", periods=48, freq="MS")
    ds = xr.Dataset({"tas": (("time", "lat", "lon"), values, {"units": "K"})},
                    coords={"time": time, "lat": ("lat", lat, {"units": "degrees_north"}),
                            "lon": ("lon", lon, {"units": "degrees_east"})})
    plain, packed, flagged = tmp_path / "plain.nc", tmp_path / "packed.nc", tmp_path / "flagged.nc"
    ds.to_netcdf(plain)
    scale = 0.001
    ds.to_netcdf(packed, encoding={"tas": {"dtype": "int16", "scale_factor": scale, "add_offset": 280.0,
                                           "_FillValue": np.int16(-32767)}})
    ds.to_netcdf(flagged, encoding={"tas": {"dtype": "int32", "scale_factor": scale, "add_offset": 0.0,
                                            "missing_value": np.int32(-999999), "_FillValue": None}})
    results = []
    for name, path in (("plain", plain), ("packed", packed), ("flagged", flagged)):
        folder = tmp_path / name
        folder.mkdir()
        code, _, err = cli("run", write_config(folder, [path], modes={"count": 2}))
        assert code == 0, err
        results.append(xr.open_dataset(folder / "out" / "modes.nc"))
    for other in results[1:]:
        # packing rounds to 0.001 K: the modes agree to that order
        np.testing.assert_allclose(other["variance_explained"], results[0]["variance_explained"], atol=1e-4)
        np.testing.assert_allclose(other["eof"], results[0]["eof"], atol=5e-3)
        assert np.isnan(other["eof"].values[0, 0, 0])  # the fill value is missing data, not a number


def test_gaps_in_time_are_allowed_and_reported(tmp_path, cli):
    path = _monthly_file(tmp_path / "f.nc", "standard", "middle", False, months=48)
    with_gap = tmp_path / "gap.nc"
    xr.open_dataset(path).isel(time=list(range(12)) + list(range(24, 48))).to_netcdf(with_gap)
    code, _, err = cli("run", write_config(tmp_path, [with_gap], modes={"count": 2}))
    assert code == 0
    assert "note: gap in time: nothing between 2000-12-16 and 2002-01-16" in err
