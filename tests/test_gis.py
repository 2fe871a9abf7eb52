"""Results that GIS and NetCDF viewers load right.

References: the IOOS compliance-checker (CF-1.10, strict), GDAL through the rasterio wheel (how GIS
software reads NetCDF and GeoTIFF), and netCDF4/xarray for the CF grid-mapping link.
"""


import numpy as np
import pytest
import rasterio
import xarray as xr

from conftest import cf_strict, field_dataset, red_field, write_config

pytestmark = pytest.mark.slow

VARIANTS = {
    # name: (latitudes, longitudes, select section, GeoTIFF rolled to -180..180?)
    "ascending lat, 0..360": (np.arange(-60.0, 61, 10), np.arange(0.0, 360, 20), {}, True),
    "descending lat, -180..180": (np.arange(60.0, -61, -10), np.arange(-180.0, 180, 20), {}, True),
    # 140..240 east: rolling it would split the box in two, so the GeoTIFF keeps 140..240
    "box across the dateline": (np.arange(-60.0, 61, 10), np.arange(-180.0, 180, 20), {"lon": [140, -120]}, False),
    "box across the prime meridian": (np.arange(60.0, -61, -10), np.arange(0.0, 360, 20), {"lon": [-60, 60]}, True),
}


@pytest.fixture(scope="module", params=list(VARIANTS))
def variant(request, tmp_path_factory):
    lat, lon, select, _ = VARIANTS[request.param]
    folder = tmp_path_factory.mktemp("gis")
    values = red_field((40, lat.size, lon.size), 8)
    values[:, 1, 2] = np.nan
    path = folder / "field.nc"
    field_dataset(values, lat, lon).to_netcdf(path)
    config = write_config(folder, [path], modes={"count": 3}, select=select,
                          output={"formats": ["netcdf", "geotiff"], "figures": False})
    from climodes.cli import main

    assert main(["run", "--quiet", str(config)]) == 0
    return folder / "out", VARIANTS[request.param][3]


def test_cf_strict_compliance(variant):
    done = cf_strict(variant[0] / "modes.nc")
    assert done.returncode == 0, done.stdout[-3000:]
    assert "All tests passed!" in done.stdout


def _check_raster(raster, ds: xr.Dataset, lon_of) -> None:
    """GDAL's view of the raster against xarray's .sel() of the same file."""
    assert raster.crs.to_epsg() == 4326
    assert raster.count == ds.sizes["mode"]
    lat, lon = ds["lat"].values, ds["lon"].values
    dlat, dlon = abs(lat[1] - lat[0]), abs(lon[1] - lon[0])
    assert raster.res == pytest.approx((dlon, dlat))
    assert raster.transform.c == pytest.approx(min(lon_of(lon)) - dlon / 2)  # west edge
    assert raster.transform.f == pytest.approx(lat.max() + dlat / 2)  # north edge: north-up
    bands = raster.read()
    rng = np.random.default_rng(0)
    for _ in range(12):
        y, x = rng.choice(lat), rng.choice(lon)
        row, col = raster.index(lon_of(np.array([x]))[0], y)
        for k in range(ds.sizes["mode"]):
            expected = float(ds["eof"].isel(mode=k).sel(lat=y, lon=x))
            got = float(bands[k, row, col])
            if np.isnan(expected):
                assert np.isnan(got) or got == raster.nodata
            else:
                assert got == pytest.approx(expected, rel=1e-5, abs=1e-6)


def test_gdal_reads_the_netcdf_georeferenced(variant):
    variant, _ = variant
    ds = xr.open_dataset(variant / "modes.nc")
    with rasterio.open(f'NETCDF:"{variant / "modes.nc"}":eof') as raster:
        _check_raster(raster, ds, lambda lon: lon)  # GDAL reads NetCDF longitudes as they are


def test_gdal_reads_the_geotiff_georeferenced(variant):
    variant, rolled = variant
    ds = xr.open_dataset(variant / "modes.nc")
    to_tiff_lon = (lambda lon: (lon + 180) % 360 - 180) if rolled else (lambda lon: lon)
    with rasterio.open(variant / "modes.tif") as raster:
        _check_raster(raster, ds, to_tiff_lon)
        assert raster.profile["compress"].lower() == "deflate"
        assert np.isnan(raster.nodata)
        assert raster.descriptions[0].startswith("mode 1 EOF (K), ")
        tags = raster.tags()  # the same provenance as the NetCDF
        for name in ("source", "history", "climodes_config", "climodes_config_sha256", "climodes_input_files"):
            assert tags[name] == str(ds.attrs[name])
        half = raster.res[0] / 2
        if rolled:  # cell centres within -180..180
            assert raster.bounds.left + half >= -180 and raster.bounds.right - half < 180


def test_netcdf4_and_xarray_find_the_crs(variant):
    variant, _ = variant
    import netCDF4

    with netCDF4.Dataset(variant / "modes.nc") as nc:
        assert nc.variables["eof"].grid_mapping == "crs"
        assert nc.variables["crs"].grid_mapping_name == "latitude_longitude"
    ds = xr.open_dataset(variant / "modes.nc", decode_coords="all")
    assert "crs" in ds["eof"].coords
    assert "WGS 84" in ds["crs"].attrs["crs_wkt"]


def test_geotiff_refuses_an_irregular_grid(tmp_path, cli):
    lat = np.array([-60.0, -30, -10, 0, 10, 30, 60])  # irregular, like a Gaussian grid
    lon = np.arange(0.0, 360, 30)
    path = tmp_path / "irregular.nc"
    field_dataset(red_field((30, lat.size, lon.size)), lat, lon).to_netcdf(path)
    config = write_config(tmp_path, [path], modes={"count": 2}, output={"formats": ["netcdf", "geotiff"]})
    code, _, err = cli("run", config)
    assert code == 2 and "output.formats: geotiff needs a regularly spaced grid" in err
    assert not (tmp_path / "out").exists()
