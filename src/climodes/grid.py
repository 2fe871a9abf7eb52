"""The grid's coordinates: one home for how climodes names and finds them.

Inside climodes a field is ``(time, lat, lon)``.  On a regular grid ``lat``
and ``lon`` are 1-D coordinates; on a curvilinear grid they are only the row
and column dimensions, and the 2-D latitudes and longitudes travel as the
coordinates :data:`GRID_LAT` and :data:`GRID_LON`; the rows' and columns' own
1-D coordinates, where the files give them (the rotated latitudes and
longitudes of a rotated-pole grid), travel as :data:`GRID_Y` and
:data:`GRID_X`.  A results file keeps the input's own names, so readers of it
find the coordinates by their CF ``standard_name`` (:func:`map_coordinates`).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

GRID_LAT, GRID_LON = "grid_lat", "grid_lon"  # the 2-D coordinates of a curvilinear grid, inside climodes
GRID_Y, GRID_X = "grid_y", "grid_x"  # the 1-D coordinates of its rows and columns, inside climodes


def is_curvilinear(field: xr.DataArray | xr.Dataset) -> bool:
    """Whether ``field`` (inside climodes) carries 2-D latitudes and longitudes."""
    return GRID_LAT in field.coords


def grid_coordinates(field: xr.DataArray) -> tuple[np.ndarray, np.ndarray]:
    """Latitude and longitude of every ``(lat, lon)`` point, as 2-D arrays, on any grid."""
    if is_curvilinear(field):
        return field[GRID_LAT].values, field[GRID_LON].values
    lat, lon = xr.broadcast(field["lat"], field["lon"])
    return lat.transpose("lat", "lon").values, lon.transpose("lat", "lon").values


def map_coordinates(ds: xr.Dataset, variable: str = "eof") -> tuple[str, str]:
    """Names of the latitude and longitude coordinates of a results map variable (by CF standard_name).

    They are the 1-D axes of a regular grid or the 2-D coordinates of a
    curvilinear one; where a file lacks the standard names, the map's last two
    dimensions are taken.
    """
    coords = ds[variable].coords
    by_name = {coords[c].attrs.get("standard_name"): str(c) for c in coords}
    rows, columns = ds[variable].dims[-2:]
    return by_name.get("latitude", str(rows)), by_name.get("longitude", str(columns))
