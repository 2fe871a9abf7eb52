"""Figures of a results dataset: a map per mode, the PC series, the variance spectrum.

Coastlines come from a file inside the package (Natural Earth 1:110m,
public domain; see ``tools/build_coastline.py``), never from the network:
compute nodes are often offline.  cartopy's downloaders are switched off on
import, so anything that would try a download fails at once instead of hanging.
"""

from __future__ import annotations

from pathlib import Path

import cartopy
import cartopy.crs as ccrs
import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402  (the backend must be chosen first)
import numpy as np  # noqa: E402
import xarray as xr  # noqa: E402
from cartopy.mpl.ticker import LatitudeFormatter, LongitudeFormatter  # noqa: E402

from climodes.coastline import coastlines  # noqa: E402
from climodes.grid import map_coordinates  # noqa: E402

cartopy.config["downloaders"] = {}

_SHADES = "RdBu_r"


def lon_lat(ds: xr.Dataset) -> tuple[np.ndarray, np.ndarray]:
    """Longitudes and latitudes of the maps' points: 1-D axes, or the 2-D coordinates of a curvilinear grid."""
    lat, lon = map_coordinates(ds)
    return ds[lon].values, ds[lat].values


def _percent(ds: xr.Dataset, k: int) -> str:
    frac = float(ds["variance_explained"][k])
    err = float(ds["variance_explained_error"][k])
    return f"{100 * frac:.1f}% \u00b1 {100 * err:.1f}%"


def _degree_ticks(ax, lons: np.ndarray, lats: np.ndarray) -> None:
    """Plain degree ticks on the map frame (cartopy's gridliner costs seconds a figure)."""
    step = 30 if np.ptp(lons) > 90 else 10
    xticks = np.arange(np.ceil(lons.min() / step) * step, lons.max() + 1e-9, step)
    yticks = np.arange(np.ceil(lats.min() / step) * step, lats.max() + 1e-9, step)
    ax.set_xticks(xticks, crs=ccrs.PlateCarree())
    ax.set_yticks(yticks, crs=ccrs.PlateCarree())
    ax.xaxis.set_major_formatter(LongitudeFormatter())
    ax.yaxis.set_major_formatter(LatitudeFormatter())
    ax.tick_params(labelsize=8)


def mode_map(ds: xr.Dataset, k: int, path: Path) -> None:
    """Draw mode ``k`` (0-based) as a filled map with coastlines."""
    field = ds["eof"].isel(mode=k)
    lons, lats = lon_lat(ds)
    centre = float((lons.min() + lons.max()) / 2)
    projection = ccrs.PlateCarree(central_longitude=centre)
    fig = plt.figure(figsize=(8.0, 4.6), layout="constrained")
    ax = fig.add_subplot(1, 1, 1, projection=projection)
    ax.set_facecolor("0.88")  # grey where there is no data: land, masked or unselected points
    limit = float(np.nanmax(np.abs(field.values))) or 1.0
    mesh = ax.pcolormesh(lons, lats, field.values, transform=ccrs.PlateCarree(), cmap=_SHADES,
                         vmin=-limit, vmax=limit, shading="nearest")
    ax.add_geometries([coastlines()], crs=ccrs.PlateCarree(), facecolor="none", edgecolor="0.15", linewidth=0.6)
    # half the widest cell on each side, so the edge cells show whole (a curvilinear grid's cells vary)
    half = np.abs(np.diff(lons, axis=-1)).max() / 2 if lons.shape[-1] > 1 else 0.5
    lat_half = np.abs(np.diff(lats, axis=0)).max() / 2 if lats.shape[0] > 1 else 0.5
    ax.set_extent([lons.min() - half, lons.max() + half, max(-90.0, lats.min() - lat_half),
                   min(90.0, lats.max() + lat_half)], crs=ccrs.PlateCarree())
    _degree_ticks(ax, lons, lats)
    units = ds["eof"].attrs.get("units", "")
    fig.colorbar(mesh, ax=ax, orientation="horizontal", shrink=0.6, pad=0.02,
                 label=f"{units} per standard deviation of PC {k + 1}")
    ax.set_title(f"Mode {k + 1}: {_percent(ds, k)} of variance", loc="left", fontsize=11)
    fig.savefig(path, dpi=110, bbox_inches="tight", pad_inches=0.15)  # maps of any shape keep their title
    plt.close(fig)


def _plottable(times: np.ndarray) -> np.ndarray:
    """datetime64 as it is; cftime dates (any calendar) as decimal years."""
    if times.dtype != object:
        return times
    return np.array([t.year + (t.month - 1) / 12 + (t.day - 1) / 365 for t in times])


def pc_series(ds: xr.Dataset, path: Path) -> None:
    """One panel per mode with its standardised PC through time."""
    time = ds["pc"].dims[1]
    count = ds.sizes["mode"]
    fig, axes = plt.subplots(count, 1, figsize=(8.0, 1.5 + 1.3 * count), sharex=True, squeeze=False,
                             layout="constrained")
    t = _plottable(ds[time].values)
    for k, ax in enumerate(axes[:, 0]):
        y = ds["pc"].isel(mode=k).values
        ax.axhline(0, color="0.6", linewidth=0.6)
        ax.fill_between(t, y, 0, where=y >= 0, color="#b2182b", alpha=0.7, linewidth=0, step="mid")
        ax.fill_between(t, y, 0, where=y < 0, color="#2166ac", alpha=0.7, linewidth=0, step="mid")
        ax.set_ylabel(f"PC {k + 1}")
        ax.text(0.995, 0.92, _percent(ds, k), transform=ax.transAxes, ha="right", va="top", fontsize=8)
    axes[0, 0].set_title("Standardised principal components", loc="left", fontsize=11)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def variance_spectrum(ds: xr.Dataset, path: Path) -> None:
    """Variance explained per mode with North et al. (1982) error bars; mixed modes drawn hollow."""
    modes = ds["mode"].values
    frac = 100 * ds["variance_explained"].values
    err = 100 * ds["variance_explained_error"].values
    sep = ds["separated"].values.astype(bool)
    fig, ax = plt.subplots(figsize=(6.5, 3.8), layout="constrained")
    ax.errorbar(modes, frac, yerr=err, fmt="none", ecolor="0.3", capsize=3, linewidth=1)
    ax.plot(modes[sep], frac[sep], "o", color="#1b7837", label="separated from its neighbours")
    ax.plot(modes[~sep], frac[~sep], "o", mfc="white", color="#762a83", label="within error of a neighbour")
    ax.set_xlabel("mode")
    ax.set_ylabel("variance explained (%)")
    ax.set_xticks(modes)
    ax.set_ylim(bottom=0)
    ax.legend(frameon=False, fontsize=8)
    ax.set_title("Variance explained, with North et al. (1982) sampling errors", loc="left", fontsize=10)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def draw_all(ds: xr.Dataset, folder: Path) -> list[Path]:
    """Draw every figure of ``ds`` into ``folder`` and return their paths."""
    paths = []
    for k in range(ds.sizes["mode"]):
        paths.append(folder / f"mode_{k + 1:02d}.png")
        mode_map(ds, k, paths[-1])
    paths.append(folder / "pcs.png")
    pc_series(ds, paths[-1])
    paths.append(folder / "variance.png")
    variance_spectrum(ds, paths[-1])
    return paths
