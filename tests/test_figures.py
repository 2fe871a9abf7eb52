"""Figures: drawn from modes.nc alone, for every kind of domain, with the network unreachable.

Outside references: areas on the WGS84 ellipsoid from pyproj's geodesic
polygon areas (Karney 2013), for the equal-area projections; numpy's convolve for the running mean; xarray's groupby for the
months of the box plots; CF/UDUNITS unit strings and the way they are
written in print (common practice) for the unit labels.
"""

import socket
import time

import matplotlib
import matplotlib.image
import matplotlib.pyplot as plt
import numpy as np
import pytest
import shapely
import xarray as xr

from climodes import figures
from climodes.coastline import coastlines
from climodes.config import FigureOptions
from climodes.demo import land_mask
from climodes.maps import (
    DIVERGING,
    NOT_USED,
    NOT_USED_EITHER,
    SEQUENTIAL,
    Domain,
    domain_of,
    grid_points,
    nice_step,
    projection_for,
    symmetric_levels,
)
from climodes.output import MARK
from climodes.pipeline import redraw
from climodes.report import units_text
from climodes.results import open_results
from conftest import field_dataset, red_field, write_config
from diagnosed import diagnosed, rewrite

# --- the network is never used


@pytest.fixture
def offline(monkeypatch):
    """Every socket connection and name lookup fails at once."""

    def refuse(*args, **kwargs):
        raise OSError("the network is off in this test")

    monkeypatch.setattr(socket.socket, "connect", refuse)
    monkeypatch.setattr(socket, "create_connection", refuse)
    monkeypatch.setattr(socket, "getaddrinfo", refuse)


def test_shipped_coastlines_cover_the_world():
    lines = coastlines()
    west, south, east, north = lines.bounds
    assert west <= -179 and east >= 179 and south < -80 and north > 80
    assert len(lines.geoms) > 100


def test_land_and_sea_where_they_are():
    """Common knowledge of geography: central Africa and Siberia are land, the central Pacific is sea."""
    lat = np.array([0.0, 60.0, 0.0])
    lon = np.array([20.0, 100.0, 180.0])
    mask = land_mask(lat, lon)
    assert mask[0, 0] and mask[1, 1] and not mask[2, 2] and not mask[0, 2]


def test_a_cartopy_download_fails_at_once():
    import cartopy.feature

    feature = cartopy.feature.NaturalEarthFeature("physical", "land", "50m")
    start = time.monotonic()
    with pytest.raises(ValueError, match="No generic downloadable item"):
        list(feature.geometries())
    assert time.monotonic() - start < 5


# --- projections


def _cell_area_ratio(projection, lon0: float, cells: list[tuple[float, float]]) -> tuple[float, float]:
    """Projected area of the second cell over the first, and the same ratio on the WGS84 ellipsoid (pyproj)."""
    import cartopy.crs as ccrs
    from pyproj import Geod

    areas, earth = [], []
    for lat0, lat1 in cells:
        lon = np.concatenate([np.linspace(lon0, lon0 + 5, 50), np.linspace(lon0 + 5, lon0, 50)])
        lat = np.concatenate([np.full(50, lat0), np.full(50, lat1)])
        xy = projection.transform_points(ccrs.PlateCarree(), lon, lat)[:, :2]
        areas.append(shapely.Polygon(xy).area)
        earth.append(abs(Geod(ellps="WGS84").polygon_area_perimeter(lon, lat)[0]))
    return areas[1] / areas[0], earth[1] / earth[0]


@pytest.mark.parametrize("domain, kind, name, cells", [
    (Domain(0, 360, -90, 90), "global", "EqualEarth", [(0, 5), (70, 75)]),
    (Domain(-180, 360, 20, 90), "polar", "LambertAzimuthalEqualArea", [(25, 30), (80, 85)]),
    (Domain(-180, 360, -90, -25), "polar", "LambertAzimuthalEqualArea", [(-30, -25), (-85, -80)]),
    (Domain(-20, 60, 30, 70), "box", "AlbersEqualArea", [(30, 35), (65, 70)]),
])
def test_maps_of_large_domains_keep_areas(domain, kind, name, cells):
    projection, found = projection_for(domain)
    assert (found, type(projection).__name__) == (kind, name)
    projected, sphere = _cell_area_ratio(projection, domain.centre, cells)
    assert projected == pytest.approx(sphere, rel=1e-3)


def test_projection_of_boxes_and_bands():
    tropical, kind = projection_for(Domain(120, 170, -20, 20))  # a box across the equator and the dateline
    assert kind == "box" and type(tropical).__name__ == "PlateCarree"
    assert tropical.proj4_params["pm"] == pytest.approx(-155)  # centred on the box: 120E to 70W
    band, kind = projection_for(Domain(0, 360, -30, 30))
    assert (kind, type(band).__name__) == ("band", "PlateCarree")
    arctic_sector, kind = projection_for(Domain(0, 90, 60, 90))
    assert (kind, arctic_sector.proj4_params["lat_0"]) == ("polar", 90)


@pytest.mark.parametrize("lons, west, width", [
    (np.arange(2.5, 360, 5), 0, 360),  # global 0..360
    (np.arange(-177.5, 180, 5), -180, 360),  # global -180..180
    (np.arange(140, 245, 5.0), 137.5, 105),  # a box across the dateline, stored in increasing longitude
    (np.r_[np.arange(140, 180, 5.0), np.arange(-180, -115, 5.0)], 137.5, 105),  # the same, stored -180..180
])
def test_domain_is_found_across_the_dateline(lons, west, width):
    domain = domain_of(lons[None, :], np.array([[10.0]]))
    assert domain.west % 360 == pytest.approx(west % 360) and domain.width == pytest.approx(width)


def test_grid_longitudes_are_made_continuous():
    ds = xr.Dataset({"eof": (("mode", "lat", "lon"), np.zeros((1, 2, 4)))},
                    coords={"lat": ("lat", [10.0, 20.0], {"standard_name": "latitude"}),
                            "lon": ("lon", [170.0, 175.0, -180.0, -175.0], {"standard_name": "longitude"})})
    lons, _ = grid_points(ds)
    np.testing.assert_allclose(lons[0], [170, 175, 180, 185])


# --- colour levels and units


@pytest.mark.parametrize("limit", [0.0123, 0.95, 1.0, 3.7, 47.0, 880.0])
def test_levels_are_symmetric_round_and_hold_every_value(limit):
    values = np.array([-0.3 * limit, limit, np.nan])
    levels = symmetric_levels(values)
    np.testing.assert_allclose(levels, -levels[::-1], atol=1e-12)
    assert 0 in np.round(levels / np.diff(levels)[0], 9) and levels[-1] >= limit
    step = np.diff(levels)[0]
    mantissa = step / 10 ** np.floor(np.log10(step))
    assert any(np.isclose(mantissa, m) for m in (1, 2, 2.5, 5))  # round steps (common practice)
    assert 8 <= len(levels) - 1 <= 12
    assert nice_step(10, 4) == 2.5 and nice_step(2.7, 5) == 0.5


@pytest.mark.parametrize("cf, printed", [
    ("degC", "\u00b0C"), ("deg_C", "\u00b0C"), ("degrees_Celsius", "\u00b0C"), ("K", "K"),
    ("mm day-1", "mm/day"), ("m s-1", "m/s"), ("m s**-1", "m s**-1"), ("W m-2", "W m\u207b\u00b2"),
    ("kg m-2 s-1", "kg m\u207b\u00b2 s\u207b\u00b9"), ("1", "1"), ("hPa", "hPa"), ("percent", "%"),
    ("(degC)^2", "\u00b0C\u00b2"), ("(mm day-1)^2", "(mm/day)\u00b2"), (None, ""),
])
def test_units_as_people_write_them(cf, printed):
    assert units_text(cf) == printed


# --- the PC series


def test_running_mean_matches_a_boxcar_convolution():
    values = np.random.default_rng(1).standard_normal(50)
    found = figures.running_mean(values, 13)
    expected = np.convolve(values, np.ones(13) / 13, mode="valid")  # numpy, the reference
    np.testing.assert_allclose(found[6:-6], expected)
    assert np.isnan(found[:6]).all() and np.isnan(found[-6:]).all()


@pytest.mark.parametrize("per_year, count, window", [
    (365, 3650, 91), (12, 600, 13), (12, 60, None), (1, 60, 5), (1, 30, None), (73, 730, 19),
])
def test_long_and_daily_series_are_smoothed(per_year, count, window):
    chosen = figures.smoothing(per_year, count)
    assert (chosen[0] if chosen else None) == window


def _results_of(tmp_path, cli, values, lat, lon, time=None, **sections):
    path = tmp_path / "field.nc"
    field_dataset(values, lat, lon, time=time).to_netcdf(path)
    sections.setdefault("modes", {"count": 3, "rotate": "varimax"})  # the figures of rotated modes from the run
    code, _, err = cli("run", write_config(tmp_path, [path], **sections))
    assert code == 0, err
    return tmp_path / "out"


@pytest.fixture
def small_results(tmp_path, cli):
    lat, lon = np.arange(-85.0, 90, 10), np.arange(5.0, 360, 10)
    return _results_of(tmp_path, cli, red_field((120, lat.size, lon.size)), lat, lon)


def _pixels(fig) -> np.ndarray:
    fig.canvas.draw()
    return np.asarray(fig.canvas.buffer_rgba())[..., :3].astype(int)


def _near(image: np.ndarray, colour, tolerance: float = 60) -> np.ndarray:
    rgb = np.array(matplotlib.colors.to_rgb(colour)) * 255
    return np.abs(image - rgb).sum(axis=-1) < tolerance


def test_an_isolated_value_is_visible(small_results):
    """A single positive step between negative neighbours is drawn (the old sign-split fill drew nothing)."""
    ds = open_results(small_results).load()
    series = np.full(ds.sizes["time"], -0.8)
    series[57] = 1.17
    ds["pc"][0] = series
    fig = figures.pc_sheet(ds, 0)
    image = _pixels(fig)
    ax = fig.axes[0]
    x = figures.decimal_years(ds["time"])
    height = image.shape[0]
    (before, top), (after, zero) = ax.transData.transform([(x[56], 1.1), (x[58], 0.05)])
    rows = slice(int(height - top), int(height - zero))  # display y counts from the bottom
    background = np.array(matplotlib.colors.to_rgb(figures.BAND)).sum() * 255

    def drawn(region):  # clearly darker than the light band behind the series (anti-aliased line pixels count)
        return region.sum(axis=-1) < background - 150

    assert drawn(image[rows, int(before):int(after) + 1]).any(axis=1).all()  # from zero all the way up
    (left, _), (right, _) = ax.transData.transform([(x[38], 0.0), (x[42], 0.0)])
    assert not drawn(image[rows, int(left):int(right)]).any()  # where the series stays negative: nothing above zero
    plt.close(fig)


def test_box_plot_months_are_the_calendar_months(small_results):
    ds = open_results(small_results).load()
    values = ds["pc"].values[0]
    groups, labels = figures._month_groups(ds, values)
    expected = ds["pc"].isel(mode=0).groupby("time.month")  # xarray, the reference
    assert labels == list("JFMAMJJASOND")
    for (month, group), found in zip(expected, groups):
        np.testing.assert_allclose(found, group.values)


# --- every figure, on every kind of domain


def _global(tmp_path, cli):
    lat, lon = np.arange(-85.0, 90, 10), np.arange(5.0, 360, 10)
    return _results_of(tmp_path, cli, red_field((96, lat.size, lon.size), 1), lat, lon), None


def _north_to_south(tmp_path, cli):
    """A global grid stored from the north pole down, as most reanalyses are (cartopy failed to cut its cells)."""
    lat, lon = np.arange(87.5, -90, -5), np.arange(0.0, 360, 5)
    return _results_of(tmp_path, cli, red_field((96, lat.size, lon.size), 7), lat, lon), None


def _polar(tmp_path, cli):
    lat, lon = np.arange(-87.5, 90, 5), np.arange(-177.5, 180, 5)
    return _results_of(tmp_path, cli, red_field((96, lat.size, lon.size), 2), lat, lon,
                       select={"lat": [20, 90]}), None


def _regional(tmp_path, cli):
    lat, lon = np.arange(20.0, 81, 2.5), np.arange(-30.0, 51, 2.5)
    return _results_of(tmp_path, cli, red_field((96, lat.size, lon.size), 3), lat, lon,
                       select={"lat": [30, 70], "lon": [-20, 40]}), None


def _dateline(tmp_path, cli):
    lat, lon = np.arange(-87.5, 90, 5), np.arange(-177.5, 180, 5)
    return _results_of(tmp_path, cli, red_field((96, lat.size, lon.size), 4), lat, lon,
                       select={"lat": [20, 65], "lon": [140, -120]}), None


def _masked(tmp_path, cli):
    """Land missing at every step; a patch of sea missing at a third of the steps (dropped)."""
    lat, lon = np.arange(-77.5, 80, 5), np.arange(2.5, 360, 5)
    values = red_field((96, lat.size, lon.size), 5)
    land = land_mask(lat, lon)
    values[:, land] = np.nan
    gappy = np.zeros_like(land)
    gappy[10:14, 30:40] = ~land[10:14, 30:40]
    values[::3, gappy] = np.nan
    folder = _results_of(tmp_path, cli, values, lat, lon)
    return folder, gappy


def _curvilinear(tmp_path, cli):
    """A rotated-pole regional model: 2-D latitudes and longitudes named by CF coordinates."""
    rlat, rlon = np.linspace(-10, 10, 14), np.linspace(-15, 15, 18)
    r_lon, r_lat = np.meshgrid(rlon, rlat)
    lat2d = 50 + r_lat + 0.3 * r_lon
    lon2d = 10 + r_lon / np.cos(np.deg2rad(lat2d)) + 0.2 * r_lat
    area = 1e8 * np.cos(np.deg2rad(lat2d))
    ds = xr.Dataset(
        {"tas": (("time", "rlat", "rlon"), red_field((72, 14, 18), 6),
                 {"units": "K", "coordinates": "lat lon", "cell_measures": "area: areacella"}),
         "areacella": (("rlat", "rlon"), area, {"units": "m2", "standard_name": "cell_area"})},
        coords={"time": xr.date_range("2000-01-01", periods=72, freq="MS"),
                "rlat": ("rlat", rlat, {"standard_name": "grid_latitude", "units": "degrees"}),
                "rlon": ("rlon", rlon, {"standard_name": "grid_longitude", "units": "degrees"}),
                "lat": (("rlat", "rlon"), lat2d, {"standard_name": "latitude", "units": "degrees_north"}),
                "lon": (("rlat", "rlon"), lon2d, {"standard_name": "longitude", "units": "degrees_east"})})
    ds.to_netcdf(tmp_path / "rcm.nc")
    config = write_config(tmp_path, [tmp_path / "rcm.nc"], modes={"count": 3, "rotate": "varimax"},
                          prepare={"weighting": "cell_area"})
    code, _, err = cli("run", config)
    assert code == 0, err
    return tmp_path / "out", None


DOMAINS = {"global": _global, "north_to_south": _north_to_south, "polar": _polar, "regional": _regional, "dateline": _dateline, "masked": _masked,
           "curvilinear": _curvilinear}
EXPECTED = ["mode_01", "mode_02", "mode_03", "rotated_01", "rotated_02", "rotated_03", "pc_01", "pc_02", "pc_03",
            "pairs", "spectrum", "residuals"]


def _image(path) -> np.ndarray:
    return (matplotlib.image.imread(path)[..., :3] * 255).round().astype(int)


def _assert_a_picture(image: np.ndarray, name: str) -> None:
    assert image.std() > 20, f"{name} is nearly blank"
    colours = np.unique((image // 8).reshape(-1, 3), axis=0)
    assert len(colours) >= 25, f"{name} has only {len(colours)} colours"


def _level_colours(levels: np.ndarray, cmap: str) -> list:
    colours = matplotlib.colormaps[cmap].resampled(len(levels) - 1)
    return [colours(i) for i in range(colours.N)]


def _share(image: np.ndarray, colours: list, tolerance: float = 10) -> float:
    hit = np.zeros(image.shape[:2], bool)
    for colour in colours:
        hit |= _near(image, colour, tolerance)
    return float(hit.mean())


def _middle(image: np.ndarray, panels: int = 1) -> np.ndarray:
    """The middle of the first of ``panels`` maps side by side."""
    rows, columns = image.shape[0], image.shape[1] / panels
    return image[int(0.4 * rows):int(0.6 * rows), int(0.4 * columns):int(0.6 * columns)]


def _check_domain(folder, dropped) -> None:
    ds = open_results(folder)
    for name in EXPECTED:
        path = folder / "figures" / f"{name}.png"
        image = _image(path)
        _assert_a_picture(image, name)
        if name.startswith("mode_"):
            values = ds["eof"].isel(mode=int(name[-2:]) - 1).values
            colours = _level_colours(symmetric_levels(values), DIVERGING)
            assert _share(_middle(image, 2), colours) > 0.3, f"{name}: no data in the middle of the map"
        if name == "residuals":
            colours = _level_colours(np.linspace(0, 1, 11), SEQUENTIAL)
            assert _share(image[:, image.shape[1] // 2:], colours) > 0.05
        if name.startswith("pc_"):
            top = image[: image.shape[0] // 2]  # the series: the PC and its running mean
            assert _near(top, figures.RAW, 150).mean() > 0.002 and _near(image, figures.SMOOTH, 60).mean() > 0.001
            assert _near(image[image.shape[0] // 2:], figures.BOX, 10).mean() > 0.01  # the box plots
    if dropped is not None:  # the two kinds of unused points are told apart
        image = _image(folder / "figures" / "mode_01.png")
        for code, (colour, _) in NOT_USED.items():
            assert _near(image, colour, 6).mean() > 0.002, f"no points drawn as {NOT_USED[code][1]}"
    ds.close()


@pytest.mark.slow
@pytest.mark.parametrize("domain", list(DOMAINS))
def test_every_figure_on_every_domain(tmp_path, cli, offline, domain):
    folder, dropped = DOMAINS[domain](tmp_path, cli)
    rewrite(folder, diagnosed(open_results(folder), dropped))
    code, out, err = cli("figures", folder, "--dpi", "50")
    assert code == 0, err
    assert sorted(p.stem for p in (folder / "figures").iterdir()) == sorted(EXPECTED)
    _check_domain(folder, dropped)


def test_maps_of_a_dateline_box_without_the_network(tmp_path, cli, offline):
    folder, _ = _dateline(tmp_path, cli)
    options, written = redraw(folder, draw=["maps"], dpi=50)
    assert [p.name for p in written] == ["mode_01.png", "mode_02.png", "mode_03.png", "rotated_01.png",
                                         "rotated_02.png", "rotated_03.png", "report.html"]
    ds = open_results(folder)
    lons, _ = grid_points(ds)
    assert lons.min() == pytest.approx(142.5) and lons.max() == pytest.approx(237.5)  # one piece, not two
    image = _image(written[0])
    values = ds["eof"].isel(mode=0).values
    assert _share(_middle(image), _level_colours(symmetric_levels(values), DIVERGING)) > 0.3


def _legend(fig) -> list[str]:
    return [t.get_text() for legend in fig.legends for t in legend.get_texts()]


def test_unused_points_are_told_apart_with_point_status(tmp_path, cli):
    folder, dropped = _masked(tmp_path, cli)
    ds = open_results(folder)
    assert (ds["point_status"] == 1).sum() > 0 and (ds["point_status"] == 0).sum() > 0  # the run wrote both kinds
    fig = figures.mode_map(ds, 0)
    assert _legend(fig) == [label for _, label in NOT_USED.values()]
    plt.close(fig)
    fig = figures.mode_map(ds.drop_vars("point_status"), 0)
    assert _legend(fig) == [NOT_USED_EITHER[1]]  # without point_status (an older file): one class
    plt.close(fig)
    fig = figures.mode_map(diagnosed(ds, dropped), 0)
    assert _legend(fig) == [label for _, label in NOT_USED.values()]
    image = _pixels(fig)
    for colour, label in NOT_USED.values():
        assert _near(image, colour, 6).mean() > 0.005, label
    plt.close(fig)


def test_mixed_and_insignificant_modes_are_marked(small_results):
    ds = diagnosed(open_results(small_results))
    ds["separated"][:] = [1, 0, 0]
    ds["significant"][:] = [1, 1, 0]
    for k, marked in enumerate([False, True, True]):
        fig = figures.mode_map(ds, k)
        image = _pixels(fig)
        texts = " ".join(t.get_text() for t in fig.texts)
        assert ("not separated" in texts) == marked and ("not significant" in texts) == (k == 2)
        assert (_near(image, figures.CAREFUL, 20).mean() > 0.003) == marked
        plt.close(fig)
    fig = figures.pairs_figure(ds)  # each pair names the modes that are not separated, not the pair as a whole
    titles = [ax.get_title(loc="left") for ax in fig.axes if ax.get_title(loc="left")]
    assert titles == ["PC 1 and PC 2 (PC 2 not separated)", "PC 2 and PC 3 (PC 2 and PC 3 not separated)"]
    plt.close(fig)


def test_title_names_variable_level_season_and_period(tmp_path, cli):
    lat, lon = np.arange(-85.0, 90, 10), np.arange(5.0, 360, 10)
    values = red_field((120, lat.size, lon.size))
    path = tmp_path / "field.nc"
    field_dataset(values, lat, lon).to_netcdf(path)
    config = write_config(tmp_path, [path], modes={"count": 2}, select={"months": [12, 1, 2]},
                          prepare={"aggregate": "seasonal"})
    assert cli("run", config)[0] == 0
    ds = open_results(tmp_path / "out")
    fig = figures.mode_map(ds, 0)
    texts = [t.get_text() for t in fig.texts]
    assert texts[0].startswith("Mode 1: ") and "% of the variance" in texts[0]
    assert texts[1] == "test field (tas), DJF means, 1981\u20131989"
    plt.close(fig)
    level = ds.assign_coords(plev=xr.DataArray(500.0, attrs={"units": "hPa"}))
    fig = figures.mode_map(level, 0)
    assert "plev 500 hPa" in fig.texts[1].get_text()
    plt.close(fig)


# --- the run draws what a redraw draws


def _drawn(folder) -> dict:
    return {p.name: p.read_bytes() for p in sorted((folder / "figures").iterdir())}


@pytest.mark.slow
def test_redrawing_gives_the_same_files_as_the_run(tmp_path, small_field, cli):
    config = write_config(tmp_path, [small_field], modes={"count": 3}, output={"figures": {"dpi": 50}})
    assert cli("run", config)[0] == 0
    folder = tmp_path / "out"
    first = _drawn(folder)
    assert len(first) == 9 and all(name.endswith(".png") for name in first)  # residuals.png from the run's own
    small_field.unlink()  # figures come from modes.nc alone
    code, out, err = cli("figures", folder)
    assert code == 0, err
    assert "drew 9 figure(s) (png, 50 dpi)" in out
    assert _drawn(folder) == first  # byte for byte: nothing in a figure depends on when it was drawn
    for kind in ("svg", "pdf"):
        assert cli("figures", folder, "--format", kind, "--draw", "maps,spectrum")[0] == 0
        once = _drawn(folder)
        assert sorted(once) == [f"mode_0{k}.{kind}" for k in (1, 2, 3)] + [f"spectrum.{kind}"]
        assert cli("figures", folder, "--format", kind, "--draw", "maps,spectrum")[0] == 0
        assert _drawn(folder) == once
    assert [p.name for p in folder.iterdir() if p.name.startswith(".")] == [MARK]  # nothing left but the manifest


def test_figures_options_on_the_command_line(tmp_path, small_results, cli):
    code, _, err = cli("figures", small_results, "--dpi", "10")
    assert code == 2 and err.strip() == "climodes: error: --dpi 10: expected a whole number from 50 to 1200; got 10"
    code, _, err = cli("figures", small_results, "--format", "gif")
    assert code == 2 and "--format gif: expected one of png, svg, pdf" in err
    code, _, err = cli("figures", small_results, "--draw", "maps,charts")
    assert code == 2 and "--draw" in err and "maps, series, pairs, spectrum, residuals" in err
    count = xr.open_dataset(small_results / "modes.nc").sizes["mode"]
    code, _, err = cli("figures", small_results, "--local-modes", str(count + 1))
    assert code == 2 and err.strip().endswith(f"holds {count} modes; give 1 to {count}")  # never clipped unsaid
    assert not (small_results / "figures").exists()
    code, out, err = cli("figures", small_results, "--draw", "spectrum", "--dpi", "60")
    assert code == 0 and [p.name for p in (small_results / "figures").iterdir()] == ["spectrum.png"]
    width = _image(small_results / "figures" / "spectrum.png").shape[1]
    assert cli("figures", small_results, "--draw", "spectrum", "--dpi", "120")[0] == 0
    assert _image(small_results / "figures" / "spectrum.png").shape[1] == pytest.approx(2 * width, abs=2)  # dpi


def test_a_figures_folder_with_foreign_files_is_left_alone(small_results, cli):
    (small_results / "figures").mkdir()
    (small_results / "figures" / "my_notes.txt").write_text("mine")
    code, _, err = cli("figures", small_results, "--draw", "spectrum", "--dpi", "50")
    assert code == 2 and "out: holds figures, which climodes did not write" in err  # the run drew none
    assert (small_results / "figures" / "my_notes.txt").read_text() == "mine"
    assert sorted(p.name for p in small_results.iterdir()) == [MARK, "figures", "modes.nc", "report.html", "run.log"]


def test_figure_options_in_the_config(tmp_path, small_field):
    from climodes.config import load_spec

    config = write_config(tmp_path, [small_field], output={"figures": {"format": "svg", "draw": ["maps", "pairs"]}})
    options = load_spec(config).output.figures
    assert options == FigureOptions(draw=["maps", "pairs"], format="svg", dpi=200)
    assert load_spec(write_config(tmp_path, [small_field], output={"figures": True})).output.figures == \
        FigureOptions()


def test_a_figure_that_fails_costs_the_figures_not_the_results(tmp_path, small_field, cli, monkeypatch):
    def broken(ds, options):
        raise ValueError("a drawing problem")
        yield

    monkeypatch.setattr(figures, "pages", broken)
    config = write_config(tmp_path, [small_field], modes={"count": 2}, output={"figures": {"dpi": 50}})
    code, out, err = cli("run", config)
    assert code == 0
    assert "note: the figures could not be drawn (ValueError: a drawing problem); the results are complete; " \
           f"climodes figures {tmp_path / 'out'} draws them again" in err
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == [MARK, "modes.nc", "report.html", "run.log"]
    assert "could not be drawn" in (tmp_path / "out" / "run.log").read_text()
