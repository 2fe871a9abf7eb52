"""Area weights and the rule for points with missing data.

On a regular latitude-longitude grid a cell's area is proportional to
``sin(lat_north) - sin(lat_south)``, close to ``cos(lat)`` times the grid
spacing.  EOFs of an area-weighted covariance need every value multiplied by
the square root of its cell's share of the area, so a grid point near the pole
does not count as much as one at the equator (common practice; North et al.
1982, Mon. Wea. Rev. 110, and most EOF texts).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from climodes.errors import UserError
from climodes.grid import is_curvilinear


def _cell_edges(lat: np.ndarray) -> np.ndarray:
    """Cell edges halfway between latitudes, the outermost clipped to the poles."""
    order = np.argsort(lat)
    sorted_lat = lat[order]
    if sorted_lat.size == 1:
        return np.array([-90.0, 90.0])
    mid = (sorted_lat[1:] + sorted_lat[:-1]) / 2
    first = sorted_lat[0] - (mid[0] - sorted_lat[0])
    last = sorted_lat[-1] + (sorted_lat[-1] - mid[-1])
    return np.clip(np.concatenate([[first], mid, [last]]), -90, 90)


def cell_area_fraction(lat: np.ndarray) -> np.ndarray:
    """Each latitude row's cell area relative to an equatorial cell of the same spacing."""
    order = np.argsort(lat)
    edges = np.deg2rad(_cell_edges(lat))
    area_sorted = (np.sin(edges[1:]) - np.sin(edges[:-1])) / np.maximum(np.diff(edges), 1e-12)
    area = np.empty_like(area_sorted)
    area[order] = area_sorted
    return area


def area_weights(lat: xr.DataArray, lon: xr.DataArray, how: str) -> xr.DataArray:
    """The weight each point's value is multiplied by before the decomposition.

    Parameters
    ----------
    lat, lon
        The grid's 1-D coordinates.
    how
        ``"coslat"``: sqrt(cos(lat)); ``"cell_area"``: sqrt of the exact
        cell area of a regular grid, relative to an equatorial cell;
        ``"none"``: 1 everywhere.

    Returns
    -------
    xarray.DataArray
        ``(lat, lon)`` weights, zero where a cell has no area.

    >>> w = area_weights(xr.DataArray([0.0, 60.0], dims="lat"), xr.DataArray([0.0], dims="lon"), "coslat")
    >>> np.round(w.values[:, 0] ** 2, 6).tolist()
    [1.0, 0.5]
    """
    phi = np.deg2rad(lat.values.astype(float))
    if how == "coslat":
        row = np.sqrt(np.clip(np.cos(phi), 0, None))
    elif how == "cell_area":
        row = np.sqrt(cell_area_fraction(lat.values.astype(float)))
    else:
        row = np.ones_like(phi)
    values = np.broadcast_to(row[:, None], (lat.size, lon.size)).copy()
    return xr.DataArray(values, dims=("lat", "lon"), coords={"lat": lat, "lon": lon}, name="weight")


def field_weights(field: xr.DataArray, how: str) -> xr.DataArray:
    """The weights of ``field``'s points: from its ``cell_area`` coordinate where the files gave cell
    areas and ``how`` is ``"cell_area"``, else from the regular grid's geometry (:func:`area_weights`).

    On a curvilinear grid (2-D latitudes) cos(lat) is not a cell's area, so ``coslat`` is refused.
    """
    if how == "cell_area" and "cell_area" in field.coords:
        area = np.asarray(field["cell_area"].transpose("lat", "lon").values, dtype=float)
        if not np.all(np.isfinite(area) & (area >= 0)) or not area.any():
            raise UserError("input.cell_area: the cell areas hold negative, missing or only zero values; "
                            "check the cell-area variable")
        return xr.DataArray(np.sqrt(area / area[area > 0].mean()), dims=("lat", "lon"), name="weight")
    if not is_curvilinear(field):
        return area_weights(field["lat"], field["lon"], how)
    if how == "none":
        return xr.DataArray(np.ones((field.sizes["lat"], field.sizes["lon"])), dims=("lat", "lon"), name="weight")
    raise UserError(f"prepare.weighting: {how} needs a regular latitude-longitude grid, and this one is "
                    "curvilinear (2-D latitudes); use weighting: cell_area with the files' cell areas "
                    "(CF cell_measures, or input.cell_area), or weighting: none")


def usable_points(missing_fraction: np.ndarray, max_missing: float) -> np.ndarray:
    """Which points enter the decomposition.

    A point missing at every step (land in an ocean field) never does.  A
    point missing at more than ``max_missing`` of the steps is dropped too;
    the others take part with their missing anomalies set to zero, that is to
    the climatology.
    """
    return (missing_fraction < 1) & (missing_fraction <= max_missing)


def point_status(missing_fraction: np.ndarray, max_missing: float) -> np.ndarray:
    """How the missing-data rule treated each point, as stored in ``modes.nc``'s ``point_status``.

    0: no data at any step (never used: land in a sea field, outside a box); 1: dropped for missing
    data (missing at more than ``max_missing`` of the steps); 2: used.

    >>> point_status(np.array([1.0, 0.5, 0.05]), 0.1).tolist()
    [0, 1, 2]
    """
    status = np.where(usable_points(missing_fraction, max_missing), 2, 1).astype(np.int8)
    status[missing_fraction >= 1] = 0
    return status
