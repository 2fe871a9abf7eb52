"""The results file: the contract's variables, dims, units and attributes, read back with plain
netCDF4 and xarray (CF-1.10 for the attribute names; the contract in GUIDE.md for the rest)."""

import hashlib

import netCDF4
import numpy as np
import pytest
import xarray as xr
import yaml

from conftest import archive_file, cf_strict, field_dataset, red_field, write_config


@pytest.fixture
def results(tmp_path, cli):
    lat = np.arange(60.0, -61, -10)  # descending, as many archives store it
    lon = np.arange(0.0, 360, 15)
    values = red_field((48, lat.size, lon.size), 3)
    values[:, 2:4, 5:8] = np.nan  # land
    path = tmp_path / "tas.nc"
    field_dataset(values, lat, lon).to_netcdf(path, encoding={"time": {"units": "hours since 1900-01-01",
                                                                        "calendar": "proleptic_gregorian"}})
    config = write_config(tmp_path, [path], modes={"count": 4})
    code, _, err = cli("run", config)
    assert code == 0, err
    return tmp_path / "out" / "modes.nc", config, path


def test_contract_with_netcdf4(results):
    path, config, source = results
    with netCDF4.Dataset(path) as nc:
        assert nc.variables["eof"].dimensions == ("mode", "lat", "lon")
        assert nc.variables["pc"].dimensions == ("mode", "time")
        for name in ("eigenvalue", "variance_explained", "variance_explained_error", "separated",
                     "effective_sample_size"):
            assert nc.variables[name].dimensions == ("mode",)
        assert nc.variables["correlation"].dimensions == ("mode", "lat", "lon")
        assert nc.variables["correlation"].grid_mapping == "crs" and nc.variables["correlation"].units == "1"
        assert nc.variables["spectrum"].dimensions == nc.variables["spectrum_explained"].dimensions == ("rank",)
        assert nc.variables["spectrum"].units == "(K)^2" and nc.variables["spectrum_explained"].unresolved_fraction == 0
        assert "significant" not in nc.variables and "noise_eigenvalue" not in nc.variables  # the test did not run
        assert nc.variables["mode"][:].tolist() == [1, 2, 3, 4]
        assert nc.variables["eof"].units == "K" and nc.variables["eof"].grid_mapping == "crs"
        assert nc.variables["pc"].units == "1" and nc.variables["variance_explained"].units == "1"
        assert nc.variables["eigenvalue"].units == "(K)^2"
        assert np.all(nc.variables["effective_sample_size"][:] > 2)
        assert nc.variables["crs"].grid_mapping_name == "latitude_longitude"
        assert "WGS 84" in nc.variables["crs"].crs_wkt
        # the input's time encoding is kept (xarray's encoding= would otherwise change it)
        assert nc.variables["time"].units == "hours since 1900-01-01"
        assert nc.variables["time"].calendar == "proleptic_gregorian"
        assert nc.variables["lat"].units == "degrees_north" and nc.variables["lat"].standard_name == "latitude"
        assert nc.variables["lon"].units == "degrees_east" and nc.variables["lon"].axis == "X"
        for coord in ("time", "lat", "lon", "mode"):  # CF: no fill values on coordinate variables
            assert "_FillValue" not in nc.variables[coord].ncattrs()
        assert nc.Conventions == "CF-1.10"
        assert nc.source.startswith("climodes ")
        assert nc.history.endswith(f"climodes run {config}")
        resolved = nc.climodes_config
        assert hashlib.sha256(resolved.encode()).hexdigest() == nc.climodes_config_sha256
        assert yaml.safe_load(resolved)["modes"]["count"] == 4
        assert f"{source} size={source.stat().st_size} modified=" in nc.climodes_input_files
        assert nc.date_created[:2] == "20"


def test_contract_with_xarray(results):
    path, _, _ = results
    ds = xr.open_dataset(path)
    assert np.all(np.diff(ds["lat"].values) < 0)  # the input's latitude order is kept
    eof = ds["eof"]
    assert np.isnan(eof.isel(mode=0, lat=slice(2, 4), lon=slice(5, 8))).all()  # masked points stay NaN
    assert np.isfinite(eof.isel(mode=0, lat=0)).all()
    frac = ds["variance_explained"].values
    assert np.all(np.diff(frac) <= 0) and 0 < frac.sum() <= 1
    np.testing.assert_allclose(ds["pc"].std("time", ddof=1), 1.0, rtol=1e-10)
    # North et al. (1982): error = fraction * sqrt(2 / N*), each mode with its own N*
    np.testing.assert_allclose(ds["variance_explained_error"].values, frac * np.sqrt(2 / ds["effective_sample_size"]))
    assert np.all(ds["effective_sample_size"].values <= ds.sizes["time"])
    assert ds["separated"].attrs["flag_meanings"] == "mixed_with_a_neighbour separated"


def test_missing_data_rule_is_counted_in_the_log_and_the_file(tmp_path, cli):
    """Our documented rule (README, prepare.max_missing): all-missing and too-often-missing points drop
    out; the rest have their missing anomalies set to zero."""
    lat, lon = np.linspace(-40, 40, 5), np.arange(0.0, 60, 10)
    values = red_field((40, 5, 6), 12)
    values[:, 0, 0] = np.nan  # missing at every step
    values[::2, 1, 1] = np.nan  # missing at half the steps: more than 10%
    values[[3, 17], 2, 2] = np.nan  # missing at 2 of 40 steps: filled
    path = tmp_path / "gappy.nc"
    field_dataset(values, lat, lon).to_netcdf(path)
    code, _, err = cli("run", write_config(tmp_path, [path], modes={"count": 2}))
    assert code == 0, err
    ds = xr.open_dataset(tmp_path / "out" / "modes.nc")
    assert ds.attrs["climodes_points"] == ("28 of 30 grid points used; 1 missing at every step; 1 missing too "
                                           "often; 2 missing values set to zero anomaly")
    eof = ds["eof"].isel(mode=0).values
    assert np.isnan(eof[0, 0]) and np.isnan(eof[1, 1]) and np.isfinite(eof[2, 2])
    log = (tmp_path / "out" / "run.log").read_text()
    assert "note: dropped 1 points missing at more than 10% of the steps" in log
    assert "note: set 2 missing values at 1 points to zero anomaly" in log
    assert "note: dropped 1 points" in err  # also told on the terminal


def _stale_archive(path):
    """Coordinates as archives leave them: ranges of the whole stored grid (one already wrong), bounds named."""
    archive_file(path, lat=np.linspace(-80, 80, 9), lon=np.arange(0.0, 360, 30),
                 coord_attrs={"lat": {"actual_range": [-90.0, 90.0], "valid_range": [-90.0, 90.0],
                                      "bounds": "lat_bnds", "long_name": "latitude"},
                              "lon": {"valid_min": 0.0, "valid_max": 360.0, "actual_range": [0.0, 357.5]},
                              "time": {"actual_range": [15.0, 705.0], "long_name": "time"}})
    with netCDF4.Dataset(path, "r+") as nc:
        nc.createDimension("nv", 2)
        bounds = nc.createVariable("lat_bnds", "f8", ("lat", "nv"))
        bounds[:] = np.column_stack([np.linspace(-90, 70, 9), np.linspace(-70, 90, 9)])


@pytest.mark.slow
def test_only_attributes_that_stay_true_are_copied(tmp_path, cli):
    _stale_archive(tmp_path / "stale.nc")
    config = write_config(tmp_path, [tmp_path / "stale.nc"], modes={"count": 2}, select={"lat": [-45, 45]})
    code, _, err = cli("run", config)
    assert code == 0, err
    with netCDF4.Dataset(tmp_path / "out" / "modes.nc") as nc:
        for name in ("lat", "lon", "time"):  # ranges of the input's values, bounds not written: gone
            assert not {"actual_range", "valid_range", "valid_min", "valid_max", "bounds"} & set(nc[name].ncattrs())
        assert nc["lat"].long_name == "latitude" and nc["time"].long_name == "time"  # what they are: kept
        assert "lat_bnds" not in nc.variables
    done = cf_strict(tmp_path / "out" / "modes.nc")  # CF 2.5.1: actual_range must hold the values' extremes
    assert done.returncode == 0, done.stdout[-3000:]


@pytest.mark.slow
def test_the_level_analysed_is_a_scalar_coordinate(tmp_path, cli):
    ds = xr.open_dataset(archive_file(tmp_path / "plain.nc", steps=30)).load()
    ds["tas"] = (ds["tas"].expand_dims(plev=[100000.0, 85000.0, 50000.0], axis=1)
                 * xr.DataArray([1.0, 2.0, 3.0], dims="plev"))
    ds["plev"].attrs = {"units": "Pa", "positive": "down", "standard_name": "air_pressure", "axis": "Z",
                        "long_name": "pressure", "actual_range": [50000.0, 100000.0]}
    ds.to_netcdf(tmp_path / "levels.nc")
    config = write_config(tmp_path, [tmp_path / "levels.nc"], modes={"count": 2}, select={"level": 85000})
    code, _, err = cli("run", config)
    assert code == 0, err
    with netCDF4.Dataset(tmp_path / "out" / "modes.nc") as nc:
        level = nc["plev"]
        assert level.dimensions == () and float(level[...]) == 85000.0  # CF 5.7: a scalar coordinate variable
        assert {k: level.getncattr(k) for k in level.ncattrs()} == {
            "units": "Pa", "positive": "down", "standard_name": "air_pressure", "axis": "Z", "long_name": "pressure"}
        assert "plev" in nc["eof"].coordinates.split() and "plev" in nc["pc"].coordinates.split()
        assert "coordinates" not in nc["crs"].ncattrs()
    done = cf_strict(tmp_path / "out" / "modes.nc")
    assert done.returncode == 0, done.stdout[-3000:]


@pytest.mark.parametrize("how", ["monthly, winter means", "daily noleap, annual means"])
def test_means_carry_cf_time_bounds(tmp_path, cli, how):
    """CF-1.10 section 7.1 (cell boundaries) and 7.3 (cell_methods), checked by the compliance-checker: each
    mean's bounds run from its first month's (or day's) start to its last one's end."""
    from conftest import cf_strict

    lat, lon = np.linspace(-40, 40, 5), np.arange(0.0, 60, 10)
    if how.startswith("monthly"):
        time = xr.date_range("1990-01-01", periods=72, freq="MS")
        section = {"select": {"months": [12, 1, 2]}, "prepare": {"aggregate": "seasonal"}}
        expected = [["1990-12-01", "1991-03-01"], ["1991-12-01", "1992-03-01"]]
    else:
        time = xr.date_range("2001-01-01 12:00", periods=6 * 365, freq="D", calendar="noleap", use_cftime=True)
        section = {"prepare": {"aggregate": "annual"}}
        expected = [["2001-01-01", "2002-01-01"], ["2002-01-01", "2003-01-01"]]
    path = tmp_path / "field.nc"
    field_dataset(red_field((time.size, 5, 6), 1), lat, lon, time=time).to_netcdf(
        path, encoding={"time": {"units": "days since 1950-01-01"}})
    code, _, err = cli("run", write_config(tmp_path, [path], modes={"count": 2}, **section))
    assert code == 0, err
    ds = xr.open_dataset(tmp_path / "out" / "modes.nc")
    assert ds["time"].attrs["bounds"] == "time_bnds" and ds["pc"].attrs["cell_methods"] == "time: mean"
    bounds = ds["time_bnds"].values[:2]
    assert [[str(t)[:10] for t in pair] for pair in bounds] == expected
    assert np.all((bounds[:, 0] <= ds["time"].values[:2]) & (ds["time"].values[:2] < bounds[:, 1]))
    done = cf_strict(tmp_path / "out" / "modes.nc")
    assert done.returncode == 0, done.stdout[-3000:]


def test_the_fitted_preparation_is_stored_and_read_back(tmp_path, cli):
    """The fit travels through modes.nc (CF-1.10 strict, units per variable), is read back by
    fitted_preparation and, applied to the input file, gives the anomalies the modes came from: with every
    mode kept, sum_k pc_k eof_k (our results contract)."""
    from conftest import cf_strict

    from climodes.prepare import apply, fitted_preparation, keys_of
    from climodes.results import open_results

    lat, lon = np.linspace(-35, 35, 8), np.arange(0.0, 100, 10)
    time = xr.date_range("1990-01-01", periods=48, freq="MS") + np.timedelta64(14, "D")
    month = xr.DataArray(time, dims="time").dt.month.values
    values = 285 + 6 * np.cos(2 * np.pi * month / 12)[:, None, None] + red_field((48, 8, 10), 5)
    values[[4, 30], 2, 3] = np.nan  # filled
    values[:, 0, 0] = np.nan  # land
    path = tmp_path / "tas.nc"
    field_dataset(values, lat, lon, time=time).to_netcdf(path)
    code, _, err = cli("run", write_config(tmp_path, [path], modes={"count": 47},
                                           prepare={"baseline": ["1990", "1992"], "detrend": "linear"}))
    assert code == 0, err
    with netCDF4.Dataset(tmp_path / "out" / "modes.nc") as nc:
        units = {name: nc[name].units for name in ("fitted_climatology", "fitted_trend_slope",
                                                    "fitted_trend_intercept", "fitted_offset", "area_weight")}
        assert units == {"fitted_climatology": "K", "fitted_trend_slope": "K day-1", "fitted_trend_intercept": "K",
                         "fitted_offset": "K", "area_weight": "1"}
        assert nc["fitted_climatology"].dimensions == ("calendar_key", "lat", "lon")
        assert nc["fitted_climatology"].key_rule == "month" and nc["calendar_key"][:].tolist() == list(range(1, 13))
        assert all(nc[name].datatype == np.float64 for name in units)
        assert nc["fitted_trend_slope"].time_origin == "1990-01-15T00:00:00"
        assert nc["fitted_offset"].preparation_steps == "climatology trend offset"
        assert "not run: scale (prepare.standardize: false)" in nc["fitted_offset"].comment
        assert "fitted_scale" not in nc.variables
        status = nc["point_status"][:]
        assert (status == 2).sum() == 79 and status[0, 0] != 2
    results = open_results(tmp_path / "out")
    fitted = fitted_preparation(results)
    field = xr.open_dataset(path)["tas"]
    anomalies = apply(field.values, fitted, keys_of(field["time"], fitted))
    decomposed = np.einsum("kt,kyx->tyx", results["pc"].values, results["eof"].values)
    used = results["point_status"].values == 2
    np.testing.assert_allclose(anomalies[:, used], decomposed[:, used], rtol=0, atol=1e-10 * np.nanmax(decomposed))
    done = cf_strict(tmp_path / "out" / "modes.nc")
    assert done.returncode == 0, done.stdout[-3000:]


def test_only_the_steps_that_ran_are_stored(tmp_path, small_field, cli):
    code, _, err = cli("run", write_config(tmp_path, [small_field], modes={"count": 2},
                                           prepare={"anomalies": "none", "standardize": True}))
    assert code == 0, err
    ds = xr.open_dataset(tmp_path / "out" / "modes.nc")
    assert [name for name in ds.data_vars if name.startswith("fitted_")] == ["fitted_scale", "fitted_offset"]
    assert ds["fitted_scale"].attrs["units"] == "K" and ds["fitted_offset"].attrs["units"] == "1"
    assert ds["fitted_offset"].attrs["preparation_steps"] == "scale offset"
    assert "not run: climatology (prepare.anomalies: none), trend (prepare.detrend: none)" in ds["fitted_offset"].attrs[
        "comment"]
    np.testing.assert_allclose(ds["area_weight"].values ** 2, np.cos(np.deg2rad(ds["lat"].values))[:, None]
                               * np.ones(ds.sizes["lon"]), rtol=1e-12)  # sqrt(cos(lat)) (coslat weighting)


def test_a_big_stack_of_maps_is_written_without_a_copy_of_it(tmp_path):
    """A 64 MB (key, lat, lon) variable held in memory, like the fitted climatology of a big grid, is written
    map by map: the arrays made while writing (Python's tracemalloc, which numpy reports its arrays to) stay
    below a quarter of it, and netCDF4 reads back the values given, one map to a chunk."""
    import tracemalloc

    from climodes.output import write_netcdf

    values = np.random.default_rng(0).standard_normal((250, 160, 400)).astype(np.float32)
    values[:, :3] = np.nan
    ds = xr.Dataset({"pc": (("mode", "time"), np.zeros((1, 250))), "stack": (("time", "lat", "lon"), values)},
                    coords={"time": np.arange(250.0), "lat": np.linspace(-80, 80, 160), "lon": np.arange(400.0)})
    tracemalloc.start()
    try:
        write_netcdf(ds, tmp_path / "big.nc", {})
        made = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert made < values.nbytes / 4, made / 1e6
    with netCDF4.Dataset(tmp_path / "big.nc") as nc:
        assert nc["stack"].chunking() == [1, 160, 400]
        np.testing.assert_array_equal(nc["stack"][:].filled(np.nan), values)
    assert ds["stack"].chunks is None  # the caller's dataset is not changed
