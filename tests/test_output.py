"""The results file: the contract's variables, dims, units and attributes, read back with plain
netCDF4 and xarray (CF-1.10 for the attribute names; the contract in GUIDE.md for the rest)."""

import hashlib

import netCDF4
import numpy as np
import pytest
import xarray as xr
import yaml

from conftest import field_dataset, red_field, write_config


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
