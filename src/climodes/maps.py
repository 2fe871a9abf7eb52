"""Maps of a results dataset: the projection that suits the domain, colour levels, points not used.

The projection follows the domain: a global field on an equal-area
projection (Equal Earth), a polar cap or hemisphere on a Lambert azimuthal
equal-area projection centred on the pole, a box near the equator on plate
carrée, and any other box on an Albers equal-area conic whose standard
parallels lie a sixth of the box's height inside its edges (the "one-sixth
rule", common practice).  Every one is centred on the domain's own middle
longitude, so a box across the dateline stays whole.

Coastlines come from a file inside the package (Natural Earth 1:110m,
public domain; see ``tools/build_coastline.py``), never from the network:
compute nodes are often offline.  cartopy's downloaders are switched off on
import, so anything that would try a download fails at once instead of hanging.
"""

from __future__ import annotations

from dataclasses import dataclass

import cartopy
import cartopy.crs as ccrs
import matplotlib

matplotlib.use("Agg")
import matplotlib.colors as mcolors  # noqa: E402  (the backend must be chosen first)
import matplotlib.path as mpath  # noqa: E402
import matplotlib.transforms as transforms  # noqa: E402
import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402

from climodes.coastline import coastlines  # noqa: E402
from climodes.grid import map_coordinates  # noqa: E402

cartopy.config["downloaders"] = {}

PLATE = ccrs.PlateCarree()
DIVERGING = "RdBu_r"
SEQUENTIAL = "YlGnBu"
# points that carry no value on the map; the flag values are those of point_status
NOT_USED = {0: ("#d2d2d2", "no data at any step"),
            1: ("#8f8272", "dropped: missing too often (prepare.max_missing)")}
NOT_USED_EITHER = ("#b4b4b4", "not used (no data, or missing too often)")


@dataclass(frozen=True)
class Domain:
    """Where the grid lies: its western edge and width in longitude, its latitude range."""

    west: float
    width: float  # degrees of longitude covered, up to 360
    south: float
    north: float

    @property
    def centre(self) -> float:
        return (self.west + self.width / 2 + 180) % 360 - 180

    @property
    def all_longitudes(self) -> bool:
        return self.width >= 359.0


def grid_points(ds: xr.Dataset, variable: str = "eof") -> tuple[np.ndarray, np.ndarray]:
    """2-D longitudes (continuous from the domain's western edge, so no jump at the dateline) and latitudes."""
    lat, lon = map_coordinates(ds, variable)
    lats, lons = ds[lat].values.astype(float), ds[lon].values.astype(float)
    if lats.ndim == 1:
        lons, lats = np.meshgrid(lons, lats)
    west = domain_of(lons, lats).west
    return west + (lons - west) % 360, lats


def domain_of(lons: np.ndarray, lats: np.ndarray) -> Domain:
    """The smallest longitude range holding every point (found from the widest gap between them) and its edges.

    Half a grid cell is added on each side, so a global grid's cells close the circle.
    """
    unique = np.unique(np.round(np.mod(lons, 360.0), 6))
    if unique.size == 1:
        return Domain(unique[0] - 0.5, 1.0, float(np.min(lats)) - 0.5, float(np.max(lats)) + 0.5)
    gaps = np.diff(np.append(unique, unique[0] + 360))
    widest = int(np.argmax(gaps))
    cell = float(np.median(gaps))
    if gaps[widest] <= 1.5 * cell:  # no gap: all longitudes, starting where the grid starts
        west, width = float(np.min(lons)), 360.0
    else:
        west, width = unique[(widest + 1) % unique.size], 360 - gaps[widest] + cell
    rows = np.unique(np.round(lats, 6))
    half = float(np.median(np.diff(rows))) / 2 if rows.size > 1 else 0.5
    south, north = max(-90.0, float(np.min(lats)) - half), min(90.0, float(np.max(lats)) + half)
    return Domain(float(west - cell / 2), float(min(width, 360.0)), south, north)


def projection_for(domain: Domain) -> tuple[ccrs.Projection, str]:
    """The projection that suits ``domain`` and its kind: ``global``, ``polar``, ``band`` or ``box``."""
    centre = domain.centre
    if domain.all_longitudes:
        if domain.south >= 0 or domain.north <= 0:
            pole = 90 if domain.south >= 0 else -90
            return ccrs.LambertAzimuthalEqualArea(central_longitude=0, central_latitude=pole), "polar"
        if domain.north - domain.south >= 100:
            return ccrs.EqualEarth(central_longitude=centre), "global"
        return ccrs.PlateCarree(central_longitude=centre), "band"
    if (domain.north >= 80 and domain.south >= 30) or (domain.south <= -80 and domain.north <= -30):
        pole = 90 if domain.north >= 80 else -90
        return ccrs.LambertAzimuthalEqualArea(central_longitude=centre, central_latitude=pole), "polar"
    if domain.south < 0 < domain.north or max(abs(domain.south), abs(domain.north)) <= 25:
        return ccrs.PlateCarree(central_longitude=centre), "box"
    sixth = (domain.north - domain.south) / 6
    parallels = (domain.south + sixth, domain.north - sixth)
    return ccrs.AlbersEqualArea(central_longitude=centre, central_latitude=(domain.south + domain.north) / 2,
                                standard_parallels=parallels), "box"


def frame(ax, domain: Domain, kind: str) -> None:
    """Set the map's extent to the domain (a round frame for a polar cap)."""
    if kind == "polar" and domain.all_longitudes:
        edge = domain.south if domain.south >= 0 else domain.north
        ax.set_extent([-180, 180, edge, 90] if domain.south >= 0 else [-180, 180, -90, edge], crs=PLATE)
        theta = np.linspace(0, 2 * np.pi, 200)
        circle = mpath.Path(np.column_stack([np.sin(theta), np.cos(theta)]) * 0.5 + 0.5)
        ax.set_boundary(circle, transform=ax.transAxes)
    elif kind == "global" and domain.south <= -60 and domain.north >= 60:
        ax.set_global()
    else:
        east = domain.west + domain.width
        if kind in ("box", "polar"):
            # a conic or azimuthal frame is the bounding box of the domain's outline, drawn densely
            lon = np.concatenate([np.linspace(domain.west, east, 60), np.full(60, east),
                                  np.linspace(east, domain.west, 60), np.full(60, domain.west)])
            lat = np.concatenate([np.full(60, domain.south), np.linspace(domain.south, domain.north, 60),
                                  np.full(60, domain.north), np.linspace(domain.north, domain.south, 60)])
            xy = ax.projection.transform_points(PLATE, lon, lat)
            ax.set_xlim(np.nanmin(xy[:, 0]), np.nanmax(xy[:, 0]))
            ax.set_ylim(np.nanmin(xy[:, 1]), np.nanmax(xy[:, 1]))
        else:
            ax.set_extent([domain.west, east - 1e-6, domain.south, domain.north], crs=PLATE)


def nice_step(limit: float, bins: int) -> float:
    """The step of 1, 2, 2.5 or 5 times a power of ten that covers ``limit`` in the number of bins nearest ``bins``.

    Of two steps equally near, the larger is taken.
    """
    power = 10 ** np.floor(np.log10(limit / bins))
    steps = [m * power * f for f in (0.1, 1, 10) for m in (1, 2, 2.5, 5)]
    return float(min(steps, key=lambda s: (abs(np.ceil(limit / s - 1e-9) - bins), -s)))


def symmetric_levels(values: np.ndarray, bins_each_side: int = 5) -> np.ndarray:
    """Colour-level edges symmetric about zero that hold every value, with zero an edge.

    The step is a round number, so the colour bar reads as people write numbers.
    """
    limit = float(np.nanmax(np.abs(values))) if np.isfinite(values).any() else 0.0
    if limit == 0:
        return np.linspace(-1, 1, 2 * bins_each_side + 1)
    step = nice_step(limit, bins_each_side)
    count = int(np.ceil(limit / step - 1e-9))
    return step * np.arange(-count, count + 1)


def status_of(ds: xr.Dataset, values: np.ndarray) -> tuple[np.ndarray, dict]:
    """Each point's class (0 no data, 1 dropped, 2 used) and the classes to draw for the points not used.

    Where ``modes.nc`` has ``point_status`` the two kinds of unused points are
    told apart; without it, every point without a value is one class.
    """
    if "point_status" in ds and ds["point_status"].shape == values.shape:
        status = np.nan_to_num(ds["point_status"].values.astype(float), nan=0).astype(int)
        status = np.where(np.isfinite(values), 2, np.minimum(status, 1))
        return status, {k: v for k, v in NOT_USED.items() if (status == k).any()}
    status = np.where(np.isfinite(values), 2, 0)
    return status, ({0: NOT_USED_EITHER} if (status == 0).any() else {})


def draw_map(ax, ds: xr.Dataset, values: np.ndarray, levels: np.ndarray, cmap: str, domain: Domain, kind: str,
             variable: str = "eof"):
    """Fill ``ax`` (a cartopy GeoAxes) with ``values`` on the grid of ``variable``; return the colour mesh.

    The points not used get their own grey shades, drawn under the coastlines and gridlines.  Rows stored
    north to south (most reanalyses) are drawn south to north: cartopy cannot cut the cells of a global
    grid in that order at the map's edge (a ValueError from its polygon code, seen with cartopy 0.26).
    """
    lons, lats = grid_points(ds, variable)
    status, unused = status_of(ds, values)
    rows = slice(None, None, -1) if lats.shape[0] > 1 and np.nanmean(lats[0]) > np.nanmean(lats[-1]) else slice(None)
    lons, lats, values, status = lons[rows], lats[rows], np.asarray(values)[rows], np.asarray(status)[rows]
    colours = matplotlib.colormaps[cmap].resampled(len(levels) - 1)
    norm = mcolors.BoundaryNorm(levels, colours.N)
    mesh = ax.pcolormesh(lons, lats, np.ma.masked_invalid(values), cmap=colours, norm=norm, transform=PLATE,
                         shading="nearest", rasterized=True)
    if unused:
        codes = sorted(unused)
        shades = mcolors.ListedColormap([unused[c][0] for c in codes])
        layer = np.ma.masked_where(status == 2, np.searchsorted(codes, np.minimum(status, max(codes))))
        ax.pcolormesh(lons, lats, layer, cmap=shades, norm=mcolors.BoundaryNorm(np.arange(len(codes) + 1) - 0.5,
                                                                                len(codes)),
                      transform=PLATE, shading="nearest", rasterized=True)
    ax.add_geometries([coastlines()], crs=PLATE, facecolor="none", edgecolor="#202020", linewidth=0.6)
    frame(ax, domain, kind)
    _gridlines(ax, domain, kind)
    ax.set_autoscale_on(False)  # the frame stays where it was set, whatever is drawn on the map later
    return mesh


def unused_legend(fig, ds: xr.Dataset, values: np.ndarray) -> None:
    """A legend at the foot of the figure naming the grey shades of the points not used."""
    _, unused = status_of(ds, values)
    if unused:
        handles = [Patch(facecolor=colour, edgecolor="0.3", linewidth=0.5, label=label)
                   for colour, label in unused.values()]
        fig.legend(handles=handles, loc="outside lower left", ncols=len(handles), frameon=False, fontsize=7.5,
                   handlelength=1.4)


def _degrees(value: float, positive: str, negative: str) -> str:
    value = (value + 180) % 360 - 180 if positive == "E" else value
    if value == 0 or abs(value) == 180:
        return f"{abs(value):g}\u00b0"
    return f"{abs(value):g}\u00b0{positive if value > 0 else negative}"


def _gridlines(ax, domain: Domain, kind: str) -> None:
    """Meridians and parallels, labelled along the frame (cartopy's gridliner costs seconds a map)."""
    width, height = domain.width, domain.north - domain.south
    step = 60 if width > 300 and kind == "global" else 30 if width > 120 else 10 if width > 30 else 5
    lat_step = 30 if height > 90 else 10 if height > 25 else 5
    if kind == "polar":
        lat_step = step = max(step, lat_step)
    east = domain.west + domain.width
    lon_lines = np.arange(np.ceil(domain.west / step) * step, east + 1e-9, step)
    lat_lines = np.arange(np.ceil(domain.south / lat_step) * lat_step, domain.north + 1e-9, lat_step)
    lat_lines = lat_lines[np.abs(lat_lines) < 90]
    style = {"color": "#5b5b5b", "linewidth": 0.5, "alpha": 0.7, "linestyle": (0, (1, 2)), "transform": PLATE}
    south, north = (-90.0, 90.0) if kind == "global" and domain.south <= -60 and domain.north >= 60 else \
        (domain.south, domain.north)
    limits = ax.get_xlim(), ax.get_ylim()
    for lon in lon_lines:
        ax.plot(np.full(100, lon), np.linspace(south, north, 100), **style)
    for lat in lat_lines:
        ax.plot(np.linspace(domain.west, east, 360), np.full(360, lat), **style)
    ax.set_xlim(limits[0])
    ax.set_ylim(limits[1])
    text = {"fontsize": 6.5, "color": "#333333", "clip_on": False}
    if kind == "polar":
        north_cap = domain.south >= 0 or domain.north >= 80
        edge = domain.south if north_cap else domain.north
        middle = 0.0 if domain.all_longitudes else domain.centre
        for lat in lat_lines:
            if lat != edge:
                ax.text(middle, lat, _degrees(lat, "N", "S"), transform=PLATE, ha="center", va="bottom", **text)
        ends = lon_lines[:-1] if domain.all_longitudes and lon_lines.size > 1 and \
            np.isclose(lon_lines[-1] - lon_lines[0], 360) else lon_lines
        for lon in ends:
            (x0, y0, _), (x1, y1, _) = ax.projection.transform_points(
                PLATE, np.array([lon, lon]), np.array([edge, edge - (1 if north_cap else -1)]))
            angle = np.arctan2(y1 - y0, x1 - x0)
            place = transforms.offset_copy(PLATE._as_mpl_transform(ax), fig=ax.figure, x=9 * np.cos(angle),
                                           y=9 * np.sin(angle), units="points")
            ax.text(lon, edge, _degrees(lon, "E", "W"), transform=place, ha="center", va="center", **text)
        return
    below = transforms.offset_copy(PLATE._as_mpl_transform(ax), fig=ax.figure, y=-3, units="points")
    left = transforms.offset_copy(PLATE._as_mpl_transform(ax), fig=ax.figure, x=-3, units="points")
    if domain.all_longitudes and lon_lines.size > 1 and np.isclose(lon_lines[-1] - lon_lines[0], 360):
        lon_lines = lon_lines[:-1]
    corner = domain.west if not domain.all_longitudes else None  # one label a corner: the parallel's
    for lon in lon_lines:
        if corner is None or abs(lon - corner) > 0.35 * step:
            ax.text(lon, south, _degrees(lon, "E", "W"), transform=below, ha="center", va="top", **text)
    for lat in lat_lines[(lat_lines > south + 0.2 * lat_step) & (lat_lines < north - 0.2 * lat_step)]:
        ax.text(domain.west + 1e-3 * domain.width, lat, _degrees(lat, "N", "S"), transform=left, ha="right", va="center", **text)
