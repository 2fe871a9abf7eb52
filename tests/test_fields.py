"""Opening and selecting: CF axis detection, many files, longitude conventions, the dateline."""

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from climodes.config import InputSection, SelectSection
from climodes.errors import UserError
from climodes.fields import lon_span, open_field, select
from conftest import field_dataset


def _grid_file(path, lon, lat=np.array([-10.0, 0.0, 10.0]), months=12, start="2000-01-01", **kw):
    values = np.broadcast_to(lon[None, None, :] + 1000 * lat[None, :, None], (months, lat.size, lon.size)).copy()
    time = pd.date_range(start, periods=months, freq="MS")
    field_dataset(values + np.arange(months)[:, None, None] * 0.001, lat, lon, time=time, **kw).to_netcdf(path)
    return path


def _open(paths, **kw):
    return open_field(InputSection(paths=[str(p) for p in paths], variable="tas", **kw))


def test_open_is_lazy_and_ordered_time_lat_lon(tmp_path):
    path = tmp_path / "f.nc"
    ds = field_dataset(np.random.rand(12, 3, 4), np.array([-10.0, 0, 10]), np.arange(4.0) * 90)
    ds.transpose("lon", "lat", "time").to_netcdf(path)  # stored as (lon, lat, time): must work
    opened = _open([path], chunks={"time": 5})
    assert opened.data.dims == ("time", "lat", "lon")
    assert opened.data.chunks[0] == (5, 5, 2)

    np.testing.assert_allclose(opened.data.values, ds["tas"].values)
    assert opened.files[0].size == path.stat().st_size


def test_opening_many_files_reads_no_values(tmp_path, values_read):
    lon = np.arange(0.0, 360, 90)
    paths = [_grid_file(tmp_path / f"{y}.nc", lon, start=f"{y}-01-01") for y in (2000, 2001, 2002)]
    opened = _open(paths, chunks={"time": 5})
    assert values_read["values"] == 0
    opened.data.isel(time=slice(0, 5)).values
    assert values_read["values"] == 5 * 3 * 4  # only the chunk asked for


def test_axes_found_by_cf_attributes_whatever_their_names(tmp_path):
    path = tmp_path / "odd.nc"
    ds = field_dataset(np.random.rand(6, 3, 4), np.array([-10.0, 0, 10]), np.arange(4.0))
    ds = ds.rename(time="t_axis", lat="northing_deg", lon="easting_deg")
    ds.to_netcdf(path)
    opened = _open([path])
    assert opened.names == {"time": "t_axis", "lat": "northing_deg", "lon": "easting_deg"}


def test_many_files_are_ordered_by_time_not_by_name(tmp_path):
    lon = np.arange(0.0, 360, 90)
    late = _grid_file(tmp_path / "a_late.nc", lon, start="2001-01-01")
    early = _grid_file(tmp_path / "b_early.nc", lon, start="2000-01-01")
    opened = _open([tmp_path / "*.nc"])
    assert opened.data.sizes["time"] == 24
    assert str(opened.data["time"].values[0])[:7] == "2000-01"
    assert [f.path for f in opened.files] == [str(late), str(early)]


def test_overlapping_files_are_an_error_naming_both(tmp_path):
    lon = np.arange(0.0, 360, 90)
    a = _grid_file(tmp_path / "a.nc", lon, start="2000-01-01")
    b = _grid_file(tmp_path / "b.nc", lon, start="2000-06-01")
    with pytest.raises(UserError, match=f"{b}: its time steps overlap those of {a}"):
        _open([a, b])


def test_repeated_steps_within_a_file_are_an_error(tmp_path):
    path = _grid_file(tmp_path / "a.nc", np.arange(0.0, 360, 90))
    ds = xr.open_dataset(path).load()
    ds.isel(time=[0, 1, 2, 2, 3]).to_netcdf(tmp_path / "dup.nc")
    with pytest.raises(UserError, match="dup.nc: time step 3 .* repeats or goes back in time"):
        _open([tmp_path / "dup.nc"])


def test_mismatched_grids_are_an_error_naming_both(tmp_path):
    a = _grid_file(tmp_path / "a.nc", np.arange(0.0, 360, 90))
    b = _grid_file(tmp_path / "b.nc", np.arange(0.0, 360, 45), start="2001-01-01")
    with pytest.raises(UserError, match="b.nc: its lon grid differs from that of .*a.nc"):
        _open([a, b])


def test_repeated_first_longitude_is_dropped(tmp_path):
    path = _grid_file(tmp_path / "wrap.nc", np.arange(0.0, 361, 90))  # 0, 90, 180, 270, 360
    opened = _open([path])
    assert opened.data["lon"].values.tolist() == [0, 90, 180, 270]
    assert "dropped longitude 360" in opened.notes[0]


def _with_extra(tmp_path, **dims):
    path = tmp_path / "extra.nc"
    ds = field_dataset(np.random.rand(6, 3, 4), np.array([-10.0, 0, 10]), np.arange(4.0))
    field = ds["tas"]
    for name, (values, attrs) in dims.items():
        field = field.expand_dims({name: values}, axis=1).copy()
        field[name].attrs = attrs
        for i in range(len(values)):
            field[{name: i}] = field[{name: i}] + 100 * (i + 1)  # tell the slices apart
    ds["tas"] = field
    ds.to_netcdf(path)
    return path, ds


def test_a_level_is_chosen_by_select_level(tmp_path):
    path, ds = _with_extra(tmp_path, plev=([1000.0, 850.0, 500.0], {"units": "hPa", "positive": "down"}))
    with pytest.raises(UserError, match=r"a level dimension plev with values 1000.0, 850.0, 500.0; choose one "
                                        r"with select.level"):
        _open([path])
    opened = open_field(InputSection(paths=[str(path)], variable="tas"), SelectSection(level=500))
    np.testing.assert_allclose(opened.data.values, ds["tas"].sel(plev=500).values)
    with pytest.raises(UserError, match=r"select.level: 300 is not a value of plev"):
        open_field(InputSection(paths=[str(path)], variable="tas"), SelectSection(level=300))


def test_an_ensemble_member_is_chosen_by_select_member(tmp_path):
    path, ds = _with_extra(tmp_path, realization=(np.array([1, 2, 3]), {"standard_name": "realization"}))
    opened = open_field(InputSection(paths=[str(path)], variable="tas"), SelectSection(member=2))
    np.testing.assert_allclose(opened.data.values, ds["tas"].sel(realization=2).values)
    with pytest.raises(UserError, match="a member dimension realization with values 1, 2, 3; choose one with "
                                        "select.member"):
        _open([path])


def test_other_extra_dimensions_are_an_error_naming_them(tmp_path):
    path, _ = _with_extra(tmp_path, band=([1.0, 2.0], {}))
    with pytest.raises(UserError, match=r"a dimension band \(2\) besides time, latitude and longitude"):
        _open([path])


@pytest.mark.parametrize("lon", [np.arange(0.0, 360, 30), np.arange(-180.0, 180, 30)])
@pytest.mark.parametrize("box, expected", [
    ([-60, 60], [-60, -30, 0, 30, 60]),       # across the prime meridian
    ([150, -150], [150, 180, 210]),           # across the dateline: W > E
    ([90, 150], [90, 120, 150]),
    ([-180, 180], list(range(-180, 180, 30))),  # the whole circle, in the box's convention
])
def test_longitude_boxes_work_in_both_conventions(tmp_path, lon, box, expected):
    opened = _open([_grid_file(tmp_path / "g.nc", lon)])
    picked = select(opened, SelectSection(lon=[float(b) for b in box]))
    got = picked["lon"].values
    assert np.all(np.diff(got) > 0), got  # always a monotonic axis
    np.testing.assert_allclose(got % 360, np.array(expected) % 360)
    # the values moved with their longitudes: each column holds its own longitude (mod 360)
    np.testing.assert_allclose(picked.isel(time=0, lat=1).values % 360, got % 360, atol=1e-6)


def test_latitude_band_works_with_descending_latitudes(tmp_path):
    lat = np.arange(80.0, -81, -20)
    opened = _open([_grid_file(tmp_path / "d.nc", np.arange(0.0, 360, 90), lat=lat)])
    picked = select(opened, SelectSection(lat=[-30.0, 50.0]))
    assert picked["lat"].values.tolist() == [40.0, 20.0, 0.0, -20.0]


def test_period_and_months(tmp_path):
    opened = _open([_grid_file(tmp_path / "p.nc", np.arange(0.0, 360, 90), months=36)])
    picked = select(opened, SelectSection(period=["2001", "2002-06"], months=[12, 1, 2]))
    assert [str(t)[:7] for t in picked["time"].values] == ["2001-01", "2001-02", "2001-12", "2002-01", "2002-02"]


@pytest.mark.parametrize("lon, said", [
    ([140.0, 160, 180, -170, -150], "140 to 210 degrees east"),  # a box across the dateline, stored -180..180
    ([200.0, 220, 240], "200 to 240 degrees east"),
    ([340.0, 0, 20], "-20 to 20 degrees east"),  # a box across the prime meridian, stored 0..360
    (list(np.arange(-180, 180, 2.5)), "the whole circle (-180 to 177.5)"),
])
def test_the_longitudes_a_grid_covers_are_told_from_its_widest_gap(lon, said):
    """Hand-worked: a grid covers the arc from the end of its widest gap eastward (common practice: that is
    how a regional box is described), so messages never call a box across the dateline "-178 to 180"."""
    assert lon_span(np.array(lon)) == said
