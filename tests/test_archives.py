"""What archives hold: CF calendars (cftime), stamps at the start, middle or end of the month with and
without CF time bounds, packed integers (CF scale_factor/add_offset, _FillValue, missing_value), gaps;
and what they hold wrong (stale or missing attributes, odd axes, mixed units), refused from coordinates
and attributes alone, or put right and said so.  Reference: the CF conventions 1.10 (section numbers
beside each case)."""

import datetime as dt

import netCDF4
import numpy as np
import pytest
import xarray as xr

import climodes

from climodes.config import InputSection, SelectSection
from climodes.errors import UserError
from climodes.fields import open_field, select
from conftest import archive_file, red_field, write_config

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


@pytest.mark.parametrize("calendar", ["noleap", "360_day", "all_leap", "standard", "gregorian", "proleptic_gregorian"])
def test_a_run_keeps_the_calendar(tmp_path, cli, calendar):
    """The time axis keeps the file's calendar, and so does every variable that names one (the fitted
    preparation's): one calendar in the file, as CF 4.4.1 reads it."""
    path = _monthly_file(tmp_path / "f.nc", calendar, "middle", True)
    code, _, err = cli("run", write_config(tmp_path, [path], modes={"count": 2}, prepare={"detrend": "linear"}))
    assert code == 0, err
    with netCDF4.Dataset(tmp_path / "out" / "modes.nc") as nc:
        assert nc["time"].calendar == calendar and nc["time"].units == "days since 2000-01-01"
        named = {name: v.calendar for name, v in nc.variables.items() if "calendar" in v.ncattrs()}
    assert {"fitted_climatology", "fitted_trend_slope"} <= set(named) and set(named.values()) == {calendar}


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


@pytest.mark.parametrize("declared", ["valid_min", "valid_range", "packed valid_range"])
def test_values_outside_the_valid_range_are_missing(tmp_path, cli, declared):
    """CF 1.10 section 2.5.1: values outside valid_min / valid_max / valid_range are missing (xarray leaves
    them as numbers); a range in a packed variable's integer type is in packed units.  A sentinel the
    file declares invalid (-1e30, or 999 K) gives the modes of the same field with those values NaN."""
    lat, lon = np.linspace(-40, 40, 5), np.arange(0, 360, 30.0)
    values = 280 + red_field((48, 5, 12), 4)
    time = xr.date_range("2000-01-01", periods=48, freq="MS")
    ds = xr.Dataset({"tas": (("time", "lat", "lon"), values, {"units": "K"})},
                    coords={"time": time, "lat": ("lat", lat, {"units": "degrees_north"}),
                            "lon": ("lon", lon, {"units": "degrees_east"})})
    invalid = ds.copy(deep=True)
    invalid["tas"][[3, 17, 30], 2, 4] = 999.0 if declared == "packed valid_range" else -1e30
    encoding = {}
    if declared == "valid_min":
        invalid["tas"].attrs["valid_min"] = 150.0
    elif declared == "valid_range":
        invalid["tas"].attrs["valid_range"] = np.array([150.0, 400.0])
    else:  # packed as int16 with 0.01 K steps about 280 K: 999 K packs to 31900, outside [-2000, 2000]
        invalid["tas"].attrs["valid_range"] = np.array([-2000, 2000], dtype=np.int16)
        encoding = {"tas": {"dtype": "int16", "scale_factor": 0.01, "add_offset": 280.0, "_FillValue": np.int16(-32767)}}
    reference = ds.copy(deep=True)
    reference["tas"][[3, 17, 30], 2, 4] = np.nan
    results = []
    for name, made, enc in (("reference", reference, encoding), ("declared", invalid, encoding)):
        (tmp_path / name).mkdir()
        made.to_netcdf(tmp_path / name / "f.nc", encoding=enc)
        code, _, err = cli("run", write_config(tmp_path / name, [tmp_path / name / "f.nc"], modes={"count": 2}))
        assert code == 0, err
        results.append(xr.open_dataset(tmp_path / name / "out" / "modes.nc"))
    assert "are taken as missing" in err and "set 3 missing values at 1 points to zero anomaly" in err
    np.testing.assert_allclose(results[1]["eigenvalue"], results[0]["eigenvalue"], rtol=1e-10)
    np.testing.assert_allclose(results[1]["eof"], results[0]["eof"], atol=1e-10)
    with xr.open_dataset(tmp_path / "declared" / "f.nc") as opened:  # the same file given from Python
        in_memory = climodes.analyse(opened["tas"], modes={"count": 2})
    assert "are taken as missing" in in_memory.attrs["climodes_notes"]
    np.testing.assert_allclose(in_memory["eigenvalue"], results[0]["eigenvalue"], rtol=1e-10)


def test_gaps_in_time_are_allowed_and_reported(tmp_path, cli):
    path = _monthly_file(tmp_path / "f.nc", "standard", "middle", False, months=48)
    with_gap = tmp_path / "gap.nc"
    xr.open_dataset(path).isel(time=list(range(12)) + list(range(24, 48))).to_netcdf(with_gap)
    code, _, err = cli("run", write_config(tmp_path, [with_gap], modes={"count": 2}))
    assert code == 0
    assert "note: gap in time: nothing between 2000-12-16 and 2002-01-16" in err


def test_many_gaps_are_one_note(tmp_path, cli):
    """Steps taken irregularly (400 days drawn from 3000) leave a hundred gaps: one note counts them and
    names the longest, instead of a line each (common practice: a summary a person reads)."""
    days = np.sort(np.random.default_rng(0).choice(3000, 400, replace=False))
    time = np.datetime64("1990-01-01") + days.astype("timedelta64[D]")
    lat, lon = np.linspace(-30, 30, 4), np.arange(0, 50.0, 10)
    path = tmp_path / "f.nc"
    xr.Dataset({"tas": (("time", "lat", "lon"), red_field((400, 4, 5)), {"units": "K"})},
               coords={"time": time, "lat": ("lat", lat, {"units": "degrees_north"}),
                       "lon": ("lon", lon, {"units": "degrees_east"})}).to_netcdf(path)
    code, _, err = cli("run", write_config(tmp_path, [path], modes={"count": 2}))
    assert code == 0, err
    spacing = np.diff(days)
    gaps = spacing > 1.5 * np.median(spacing)
    longest = int(np.argmax(np.where(gaps, spacing, 0)))
    notes = [line for line in err.splitlines() if "gap" in line]
    assert notes == [f"note: gaps in time: {gaps.sum()} places where steps lie more than 1.5 times the usual "
                     f"{np.median(spacing):g} day(s) apart; the longest: nothing between {str(time[longest])[:10]} "
                     f"and {str(time[longest + 1])[:10]}"]


# --- what real archive files hold: read right or refused, from coordinates and attributes alone

def _two(tmp_path, first: dict, second: dict):
    """Two files one after the other (the second starts 800 days after the first)."""
    return [archive_file(tmp_path / "a.nc", **first), archive_file(tmp_path / "b.nc", first_day=800.0, **second)]


def _without_time_values(path):
    """A time dimension with no time variable: the steps' positions would be taken for dates."""
    xr.open_dataset(archive_file(path.with_suffix(".plain.nc"))).load().drop_vars("time").to_netcdf(path)
    return path


REFUSED = {
    # name: (files made in tmp_path, select section, what the one line says).
    # CF 4.4: a time coordinate has units "UNIT since DATE" and a calendar (4.4.1); CF 3.1: units say what the
    # values mean, so files in different units do not add up; CF 4.1: latitudes lie in -90..90; CF 1.3 and 5:
    # coordinate variables hold one value per index, strictly monotonic.
    "time without units": (lambda t: [archive_file(t / "f.nc", time_units=None)], {},
                           r"f.nc: time variable 'time' has no units, so its values are not dates"),
    "time in kelvin": (lambda t: [archive_file(t / "f.nc", time_units="K")], {},
                       r"f.nc: time variable 'time' has units 'K', not CF time units \('UNIT since DATE'\)"),
    # cftime turns months since a date into dates only in the 360_day calendar (from memory of its documentation);
    # CF 4.4 advises against month units
    "months since a date": (lambda t: [archive_file(t / "f.nc", time_units="months since 2000-01-01")], {},
                            r"f.nc: time variable 'time' has units 'months since 2000-01-01' with calendar "
                            r"'standard', which cannot be turned into dates"),
    "time since no date": (lambda t: [archive_file(t / "f.nc", time_units="days since someday")], {},
                           r"f.nc: time variable 'time' has units 'days since someday'"),
    "no time steps": (lambda t: [archive_file(t / "f.nc", steps=0)], {},
                      r"f.nc: no time steps \(its time dimension is empty\); remove the file from input.paths"),
    "no time steps among good files": (lambda t: _two(t, {}, {"steps": 0}), {}, r"b.nc: no time steps"),
    "calendars differ": (lambda t: _two(t, {}, {"calendar": "noleap"}), {},
                         r"b.nc: its calendar 'noleap' differs from the calendar 'standard' of .*a.nc"),
    "calendars differ, both cftime": (lambda t: _two(t, {"calendar": "360_day"}, {"calendar": "365_day"}), {},
                                      r"b.nc: its calendar 'noleap' differs from the calendar '360_day' of .*a.nc"),
    # CF 4.4.1: the standard calendar is Julian before 1582-10-15; xarray holds such dates as cftime objects
    "dates before and after the Gregorian reform": (
        lambda t: _two(t, {"time_units": "days since 1500-01-01"}, {"time_units": "days since 2000-01-01"}), {},
        r"b.nc: its dates \(from 2002-03-11\) cannot share one time axis with those of .*a.nc \(from 1500-01-16\)"),
    "units differ": (lambda t: _two(t, {}, {"units": "degC"}), {}, r"b.nc: tas is in 'degC', but in 'K' in .*a.nc"),
    "units missing in one file": (lambda t: _two(t, {}, {"units": None}), {},
                                  r"b.nc: tas has no units, but in 'K' in .*a.nc"),
    "units only in one file": (lambda t: _two(t, {"units": None}, {}), {},
                               r"b.nc: tas is in 'K', but without units in .*a.nc"),
    "time steps without dates": (lambda t: [_without_time_values(t / "f.nc")], {},
                                 r"f.nc: the time dimension time of variable 'tas' has no coordinate values"),
    "latitudes without values": (lambda t: [archive_file(t / "f.nc", lat=None)], {},
                                 r"f.nc: the latitude dimension lat of variable 'tas' has no coordinate values"),
    "longitudes without values": (lambda t: [archive_file(t / "f.nc", lon=None)], {},
                                  r"f.nc: the longitude dimension lon of variable 'tas' has no coordinate values"),
    "latitudes beyond the poles": (lambda t: [archive_file(t / "f.nc", lat=np.array([0.0, 45, 90, 135, 180]))], {},
                                   r"f.nc: latitude lat holds values from 0 to 180, outside -90..90"),
    "a latitude missing": (lambda t: [archive_file(t / "f.nc", lat=np.array([0.0, 10, np.nan, 20, 30]))], {},
                           r"f.nc: lat holds missing or infinite values; give every row its latitude"),
    "latitudes out of order": (lambda t: [archive_file(t / "f.nc", lat=np.array([0.0, 10, -10, 20, 30]))], {},
                               r"f.nc: latitudes lat are out of order \(10 then -10 at row 2\)"),
    "latitude repeated": (lambda t: [archive_file(t / "f.nc", lat=np.array([0.0, 10, 10, 20, 30]))], {},
                          r"f.nc: latitudes lat are out of order \(10 then 10 at row 2\)"),
    "longitudes out of order": (lambda t: [archive_file(t / "f.nc", lon=np.array([0.0, 20, 10, 30, 40, 50]))], {},
                                r"f.nc: longitudes lon are out of order \(20 then 10 at column 2\)"),
    # rolled twice round: no one start makes it increase
    "longitudes rolled twice": (lambda t: [archive_file(t / "f.nc", lon=np.array([180.0, 270, 0, 90, 200, 300]))],
                                {}, r"f.nc: longitudes lon are out of order \(270 then 0 at column 2\)"),
    # increasing round the circle from 180, but 180 and -180 are one meridian
    "longitudes rolled onto themselves": (
        lambda t: [archive_file(t / "f.nc", lon=np.array([90.0, 180, -180, -90, 0, 45]))], {},
        r"f.nc: longitudes lon are out of order \(180 then -180 at column 2\)"),
    "level asked of a field without levels": (lambda t: [archive_file(t / "f.nc")], {"level": 500},
                                              r"select.level: 500 is given, but variable 'tas' in .*f.nc has no "
                                              r"vertical axis \(time, lat, lon\); remove select.level"),
    "member asked of a field without members": (lambda t: [archive_file(t / "f.nc")], {"member": 3},
                                                r"select.member: 3 is given, but variable 'tas' in .*f.nc has no "
                                                r"ensemble axis"),
}


@pytest.mark.parametrize("case", list(REFUSED))
def test_archive_defects_are_refused_at_open_without_reading_the_field(tmp_path, values_read, case):
    make, choice, message = REFUSED[case]
    paths = make(tmp_path)
    values_read["values"] = 0  # count from here: making a file may read another
    with pytest.raises(UserError, match=message):
        opened = open_field(InputSection(paths=[str(p) for p in paths], variable="tas"), SelectSection(**choice))
        select(opened, SelectSection(**choice))
    assert values_read["values"] == 0


def test_the_time_variable_that_gives_no_dates_is_the_one_named(tmp_path):
    path = archive_file(tmp_path / "f.nc")
    with netCDF4.Dataset(path, "r+") as nc:  # the field's time is fine; another variable's is not
        issued = nc.createVariable("issued", "f8", ())
        issued.units = "months since 1999-12-01"
        issued[...] = 1.0
        nc["tas"].coordinates = "issued"  # a CF scalar coordinate: read after the time coordinate
    with pytest.raises(UserError, match=r"f.nc: time variable 'issued' has units 'months since 1999-12-01'"):
        open_field(InputSection(paths=[str(path)], variable="tas"))


@pytest.mark.parametrize("calendars", [("standard", "gregorian"), ("standard", "proleptic_gregorian"),
                                       ("noleap", "365_day"), (None, "standard")])
def test_calendar_names_for_the_same_days_agree(tmp_path, calendars):
    # CF 4.4.1: gregorian is standard, 365_day is noleap; standard and proleptic_gregorian differ before 1582 only
    paths = _two(tmp_path, {"calendar": calendars[0]}, {"calendar": calendars[1]})
    assert open_field(InputSection(paths=[str(p) for p in paths], variable="tas")).data.sizes["time"] == 48


@pytest.mark.parametrize("lon", [np.r_[np.arange(180.0, 360, 30), np.arange(0.0, 180, 30)],
                                 np.r_[np.arange(0.0, 180, 30), np.arange(-180.0, 0, 30)]])
def test_longitudes_rolled_round_the_circle_are_put_in_order(tmp_path, values_read, lon):
    path = archive_file(tmp_path / "rolled.nc", lon=lon)
    with netCDF4.Dataset(path, "r+") as nc:  # each column holds its own longitude, to follow the values
        nc["tas"][:] = np.broadcast_to(lon, nc["tas"].shape)
    opened = open_field(InputSection(paths=[str(path)], variable="tas"))
    assert values_read["values"] == 0
    got = opened.data["lon"].values
    np.testing.assert_array_equal(got, np.sort(lon))
    np.testing.assert_array_equal(opened.data.isel(time=0, lat=0).values, got)
    assert f"longitudes stored from {lon[0]:g} round to {lon[-1]:g} were put in increasing order" in opened.notes[0]
    box = select(opened, SelectSection(lon=[100.0, 200.0]))  # across the stored seam
    np.testing.assert_array_equal(box.isel(time=0, lat=0).values % 360, [120, 150, 180])


def _scalar_level(path, level: float):
    """A field at one pressure level, stored as a CF scalar coordinate (CF 5.7), as CMIP files store it."""
    ds = xr.open_dataset(archive_file(path.with_suffix(".plain.nc"))).load()
    ds = ds.assign_coords(plev=((), level, {"units": "Pa", "standard_name": "air_pressure", "positive": "down"}))
    ds.to_netcdf(path)
    return path


def test_a_level_given_must_be_the_level_a_field_holds(tmp_path):
    path = _scalar_level(tmp_path / "f.nc", 50000.0)
    opened = open_field(InputSection(paths=[str(path)], variable="tas"), SelectSection(level=50000))
    assert float(opened.data["plev"]) == 50000
    with pytest.raises(UserError, match=r"select.level: 500 is not the level of variable 'tas' in .*f.nc, which "
                                        r"holds plev = 50000.0 Pa only"):
        open_field(InputSection(paths=[str(path)], variable="tas"), SelectSection(level=500))


def test_a_level_dimension_of_length_one_must_hold_the_level_given(tmp_path):
    ds = xr.open_dataset(archive_file(tmp_path / "plain.nc")).load()
    ds["tas"] = ds["tas"].expand_dims(plev=[85000.0], axis=1)
    ds["plev"].attrs = {"units": "Pa", "positive": "down"}
    ds.to_netcdf(tmp_path / "f.nc")
    spec = InputSection(paths=[str(tmp_path / "f.nc")], variable="tas")
    assert float(open_field(spec).data["plev"]) == 85000  # kept as a scalar coordinate
    assert open_field(spec, SelectSection(level=85000)).data.dims == ("time", "lat", "lon")
    with pytest.raises(UserError, match=r"select.level: 50000 is not a value of plev in .*f.nc; there: 85000.0"):
        open_field(spec, SelectSection(level=50000))
