"""Curvilinear grids (2-D latitude and longitude, CF `coordinates`), weighted by the files' cell areas
(CF `cell_measures`).  References: the eofs package with the same weights, sqrt(cell area), and the
IOOS compliance-checker for CF-1.10."""


import netCDF4
import numpy as np
import pytest
import xarray as xr
from eofs.standard import Eof

from climodes.config import InputSection, SelectSection
from climodes.fields import open_field, select
from climodes.prepare import anomalies
from conftest import cf_strict, red_field, write_config


def _regional_model(path, measures=True):
    """A skewed regional grid, as a rotated-pole model writes it: 1-D rotated axes (one with a stale
    actual_range), 2-D lat/lon, the rotated pole as a CF grid mapping (CF 5.6, appendix F)."""
    rlat, rlon = np.linspace(-10, 10, 12), np.linspace(-15, 15, 16)
    r_lon, r_lat = np.meshgrid(rlon, rlat)
    lat2d = 50 + r_lat + 0.3 * r_lon
    lon2d = 10 + r_lon / np.cos(np.deg2rad(lat2d)) + 0.2 * r_lat
    area = 1e8 * np.cos(np.deg2rad(lat2d)) * (1 + 0.1 * np.sin(r_lon))
    time = xr.date_range("2000-01-01", periods=60, freq="MS")
    attrs = {"units": "K", "coordinates": "lat lon", "grid_mapping": "rotated_pole"}
    if measures:
        attrs["cell_measures"] = "area: areacella"
    ds = xr.Dataset(
        {"tas": (("time", "rlat", "rlon"), red_field((60, 12, 16), 9), attrs),
         "areacella": (("rlat", "rlon"), area, {"units": "m2", "standard_name": "cell_area"}),
         "rotated_pole": ((), b"", {"grid_mapping_name": "rotated_latitude_longitude",
                                    "grid_north_pole_latitude": 39.25, "grid_north_pole_longitude": -162.0})},
        coords={"time": time,
                "rlat": ("rlat", rlat, {"standard_name": "grid_latitude", "units": "degrees", "axis": "Y",
                                        "actual_range": [-12.0, 12.0]}),
                "rlon": ("rlon", rlon, {"standard_name": "grid_longitude", "units": "degrees", "axis": "X"}),
                "lat": (("rlat", "rlon"), lat2d, {"standard_name": "latitude", "units": "degrees_north"}),
                "lon": (("rlat", "rlon"), lon2d, {"standard_name": "longitude", "units": "degrees_east"})},
    )
    ds.to_netcdf(path)
    return ds


def test_opened_as_a_curvilinear_field(tmp_path):
    ds = _regional_model(tmp_path / "rcm.nc")
    opened = open_field(InputSection(paths=[str(tmp_path / "rcm.nc")], variable="tas"))
    assert opened.data.dims == ("time", "lat", "lon") and opened.grid == ("lat", "lon")
    np.testing.assert_allclose(opened.data["grid_lat"].values, ds["lat"].values)
    np.testing.assert_allclose(opened.data["cell_area"].values, ds["areacella"].values)


def test_matches_eofs_with_cell_area_weights(tmp_path, cli):
    ds = _regional_model(tmp_path / "rcm.nc")
    config = write_config(tmp_path, [tmp_path / "rcm.nc"], modes={"count": 3},
                          prepare={"weighting": "cell_area"})
    code, _, err = cli("run", config)
    assert code == 0, err
    found = xr.open_dataset(tmp_path / "out" / "modes.nc")
    assert found["eof"].dims == ("mode", "rlat", "rlon")
    assert found["lat"].dims == ("rlat", "rlon") and "crs" not in found
    # the same anomalies, weighted by sqrt(cell area / mean area), in the eofs package
    field = ds["tas"]
    anomaly = anomalies(field, "climatology", None).values
    weights = np.sqrt(ds["areacella"].values / ds["areacella"].values.mean())
    ref = Eof(anomaly, weights=weights)
    np.testing.assert_allclose(found["variance_explained"].values, ref.varianceFraction(3), atol=1e-6)
    maps = ref.eofsAsCovariance(neofs=3, pcscaling=1)
    for k in range(3):
        assert abs(np.corrcoef(found["eof"].values[k].ravel(), maps[k].ravel())[0, 1]) >= 0.99999
    with netCDF4.Dataset(tmp_path / "out" / "modes.nc") as nc:
        assert set(nc["eof"].coordinates.split()) == {"lat", "lon"}  # CF: viewers place the points by these


def test_coslat_is_refused_on_a_curvilinear_grid(tmp_path, cli):
    _regional_model(tmp_path / "rcm.nc")
    code, _, err = cli("run", write_config(tmp_path, [tmp_path / "rcm.nc"], modes={"count": 2}))
    assert code == 2 and "prepare.weighting: coslat needs a regular latitude-longitude grid" in err
    assert len(err.strip().splitlines()) == 1 and not (tmp_path / "out").exists()


def test_cell_area_named_in_the_config(tmp_path, cli):
    _regional_model(tmp_path / "rcm.nc", measures=False)
    config = write_config(tmp_path, [tmp_path / "rcm.nc"], modes={"count": 2}, prepare={"weighting": "cell_area"},
                          input={"cell_area": "areacella"})
    assert cli("run", config)[0] == 0
    config = write_config(tmp_path, [tmp_path / "rcm.nc"], modes={"count": 2}, prepare={"weighting": "cell_area"},
                          input={"cell_area": "area_of_cells"}, output={"overwrite": True})
    code, _, err = cli("run", config)
    assert code == 2 and "no cell-area variable 'area_of_cells' (input.cell_area)" in err


def test_cell_area_weighting_needs_areas_on_a_curvilinear_grid(tmp_path, cli):
    _regional_model(tmp_path / "rcm.nc", measures=False)
    config = write_config(tmp_path, [tmp_path / "rcm.nc"], modes={"count": 2}, prepare={"weighting": "cell_area"})
    code, _, err = cli("run", config)
    assert code == 2 and "prepare.weighting: cell_area needs a regular latitude-longitude grid" in err


def test_a_box_on_a_curvilinear_grid_masks_the_points_outside(tmp_path):
    ds = _regional_model(tmp_path / "rcm.nc")
    opened = open_field(InputSection(paths=[str(tmp_path / "rcm.nc")], variable="tas"))
    picked = select(opened, SelectSection(lat=[45.0, 55.0], lon=[5.0, 15.0]))
    lat, lon = picked["grid_lat"].values, picked["grid_lon"].values
    inside = (lat >= 45) & (lat <= 55) & (lon >= 5) & (lon <= 15)
    values = picked.isel(time=0).values
    assert np.all(np.isnan(values[~inside])) and np.all(np.isfinite(values[inside]))
    assert picked.sizes["lat"] < ds.sizes["rlat"] or picked.sizes["lon"] < ds.sizes["rlon"]


def test_geotiff_is_refused_on_a_curvilinear_grid(tmp_path, cli):
    _regional_model(tmp_path / "rcm.nc")
    config = write_config(tmp_path, [tmp_path / "rcm.nc"], modes={"count": 2}, prepare={"weighting": "cell_area"},
                          output={"formats": ["netcdf", "geotiff"]})
    code, _, err = cli("run", config)
    assert code == 2 and "geotiff needs a regular latitude-longitude grid" in err


@pytest.mark.slow
def test_curvilinear_results_are_cf_compliant_and_drawn(tmp_path, cli):
    _regional_model(tmp_path / "rcm.nc")
    config = write_config(tmp_path, [tmp_path / "rcm.nc"], modes={"count": 2, "noise_surrogates": 19},
                          prepare={"weighting": "cell_area"}, output={"figures": {"draw": ["maps"], "dpi": 60}})
    code, _, err = cli("run", config)
    assert code == 0, err
    assert (tmp_path / "out" / "figures" / "mode_01.png").stat().st_size > 10_000
    assert xr.open_dataset(tmp_path / "out" / "modes.nc")["correlation"].dims == ("mode", "rlat", "rlon")
    done = cf_strict(tmp_path / "out" / "modes.nc")
    assert done.returncode == 0, done.stdout[-3000:]
    code, out, _ = cli("show", tmp_path / "out")
    assert code == 0 and "(2-D)" in out


@pytest.mark.slow
def test_a_box_keeps_the_rotated_coordinates_and_the_grid_mapping(tmp_path, cli):
    ds = _regional_model(tmp_path / "rcm.nc")
    config = write_config(tmp_path, [tmp_path / "rcm.nc"], modes={"count": 2}, prepare={"weighting": "cell_area"},
                          select={"lat": [45.0, 55.0]})
    code, _, err = cli("run", config)
    assert code == 0, err
    found = xr.open_dataset(tmp_path / "out" / "modes.nc")
    rows = found["rlat"].values
    assert 0 < rows.size < ds.sizes["rlat"]  # the rows holding the box, with their own rotated latitudes
    np.testing.assert_allclose(rows, ds["rlat"].values[np.isin(ds["rlat"].values, rows)])
    np.testing.assert_allclose(found["rlon"].values, ds["rlon"].values)
    np.testing.assert_allclose(found["lat"].values, ds["lat"].sel(rlat=rows).values)
    assert found["rlat"].attrs == {"standard_name": "grid_latitude", "units": "degrees", "axis": "Y"}
    assert found["eof"].attrs["grid_mapping"] == "rotated_pole"
    assert found["rotated_pole"].attrs == ds["rotated_pole"].attrs
    done = cf_strict(tmp_path / "out" / "modes.nc")
    assert done.returncode == 0, done.stdout[-3000:]
