"""Open a field lazily from one or many NetCDF files (or Zarr stores), and select from it.

The field comes back as a dask-backed :class:`xarray.DataArray` with dimensions
renamed to ``(time, lat, lon)`` in that order, whatever the files call them or
however they order them; :class:`OpenedField` remembers the files' own names
so the results can use them again.  Nothing here reads the field's values:
only coordinates, which are small.

Axes are found from CF attributes first (``axis``, ``standard_name``,
``units``), then from common names.  On a curvilinear grid (2-D latitude and
longitude named by CF ``coordinates``) the dimensions ``lat`` and ``lon`` are
its rows and columns, and the 2-D coordinates travel as ``grid_lat`` and
``grid_lon``; cell areas named by CF ``cell_measures`` (or ``input.cell_area``)
travel as the coordinate ``cell_area``.
"""

from __future__ import annotations

import dataclasses
import glob
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from climodes.config import InputSection, SelectSection
from climodes.dates import in_period
from climodes.errors import UserError
from climodes.grid import GRID_LAT, GRID_LON, GRID_X, GRID_Y
from climodes.storage import Storage, storage_of

_LAT_UNITS = {"degrees_north", "degree_north", "degree_n", "degrees_n", "degreen", "degreesn"}
_LON_UNITS = {"degrees_east", "degree_east", "degree_e", "degrees_e", "degreee", "degreese"}
_VERTICAL = {"air_pressure", "height", "depth", "altitude", "model_level_number", "atmosphere_sigma_coordinate",
             "atmosphere_hybrid_sigma_pressure_coordinate", "ocean_sigma_coordinate"}
_NAMES = {
    "time": ("time", "t", "date", "valid_time"),
    "lat": ("lat", "latitude", "lats", "nav_lat", "y_lat"),
    "lon": ("lon", "longitude", "lons", "nav_lon", "x_lon"),
}


@dataclass(frozen=True)
class InputFile:
    """One input file as it was when read: for provenance."""

    path: str
    size: int
    modified: float


@dataclass
class OpenedField:
    """A lazily opened field and what the results need to know about where it came from."""

    data: xr.DataArray
    files: list[InputFile]
    names: dict[str, str]
    time_encoding: dict = field(default_factory=dict)
    pieces: list[xr.DataArray] = field(default_factory=list)  # each file's lazy array, in time order
    restamped: bool = False  # stamps moved to the middles of time bounds
    grid: tuple[str, str] | None = None  # the files' names of 2-D latitude and longitude (curvilinear grids)
    grid_mapping: xr.DataArray | None = None  # the files' CF grid-mapping variable (curvilinear grids)
    opening_notes: list[str] = field(default_factory=list)  # what opening the files changed, to say every time
    storages: list[Storage] = field(default_factory=list)  # how each file stores the field, in time order
    datasets: list[xr.Dataset] = field(default_factory=list)  # the files as opened (closing one frees its caches;
    # it opens again when read)
    valid: list[tuple[float, float] | None] = field(default_factory=list)  # each piece's CF valid range, if any
    notes: list[str] = field(default_factory=list)

    def close_files(self) -> None:
        """Close the files (their chunk caches go with them); a later read opens them again."""
        for ds in self.datasets:
            ds.close()


def is_zarr(path: str) -> bool:
    """Whether ``path`` names a Zarr store (a folder whose name ends in ``.zarr``)."""
    return str(path).rstrip("/").endswith(".zarr")


def _engine(path: str) -> str:
    return "zarr" if is_zarr(path) else "netcdf4"


def _size_of(path: str) -> int:
    """Bytes of a file, or of every file in a Zarr store."""
    if not os.path.isdir(path):
        return os.stat(path).st_size
    return sum(os.stat(os.path.join(folder, name)).st_size for folder, _, names in os.walk(path) for name in names)


def expand_paths(patterns: list[str]) -> list[str]:
    """Expand glob patterns into a sorted, duplicate-free list of existing files (or Zarr stores: folders
    named ``*.zarr``).

    A path that names an existing file is that file, even when its name holds glob characters
    (``tas[1].nc``).

    Raises
    ------
    UserError
        If a plain path does not exist or a pattern matches no file.
    """
    files: list[str] = []
    for pattern in patterns:
        if glob.has_magic(pattern) and not os.path.isfile(pattern):  # a file named with [ ] * ? is that file
            matches = sorted(glob.glob(pattern))
            if not matches:
                raise UserError(f"input.paths: {pattern!r} matches no file; check the folder and the pattern")
        elif os.path.isfile(pattern) or (is_zarr(pattern) and os.path.isdir(pattern)):
            matches = [pattern]
        else:
            raise UserError(f"input.paths: {pattern}: no such file; check the path (relative paths are read "
                            "from the config file's folder)")
        files.extend(m for m in matches if m not in files)
    return files


def _is_axis(coord: xr.DataArray, axis: str) -> bool:
    attrs = {k: str(v).strip().lower() for k, v in coord.attrs.items()}
    if axis == "time":
        return (
            attrs.get("axis") == "t"
            or attrs.get("standard_name") == "time"
            or np.issubdtype(coord.dtype, np.datetime64)
            or (coord.dtype == object and coord.size > 0 and hasattr(coord.values.flat[0], "calendar"))
        )
    units = _LAT_UNITS if axis == "lat" else _LON_UNITS
    standard = "latitude" if axis == "lat" else "longitude"
    return attrs.get("standard_name") == standard or attrs.get("units") in units


def _grid_coordinates(da: xr.DataArray) -> tuple[str, str] | None:
    """Names of 2-D latitude and longitude coordinates of ``da`` (a curvilinear grid), if it has them."""
    two_d = [c for c in da.coords if da[c].ndim == 2 and set(da[c].dims) <= set(da.dims)]
    lat = [c for c in two_d if _is_axis(da[c], "lat") or str(c).lower() in _NAMES["lat"]]
    lon = [c for c in two_d if _is_axis(da[c], "lon") or str(c).lower() in _NAMES["lon"]]
    if lat and lon and da[lat[0]].dims == da[lon[0]].dims:
        return str(lat[0]), str(lon[0])
    return None


def find_axes(da: xr.DataArray, where: str) -> tuple[dict[str, str], tuple[str, str] | None]:
    """Map ``time``, ``lat`` and ``lon`` to the names of ``da``'s dimensions.

    CF attributes are tried first, then common names.  A field without 1-D
    latitude and longitude axes but with 2-D latitude and longitude
    coordinates (CF ``coordinates``) is on a curvilinear grid: ``lat`` and
    ``lon`` then name its row and column dimensions, and the second value
    returned names the 2-D coordinates (``None`` on a regular grid).

    Raises
    ------
    UserError
        If an axis is missing, or is a dimension without coordinate values
        (its positions would otherwise be taken for dates or degrees).
    """
    found: dict[str, str] = {}
    grid = None
    what = {"time": "time", "lat": "latitude", "lon": "longitude"}
    for axis in ("time", "lat", "lon"):
        by_attrs = [d for d in da.dims if d in da.coords and _is_axis(da[d], axis) and d not in found.values()]
        by_name = [d for d in da.dims if str(d).lower() in _NAMES[axis] and d not in found.values()]
        candidates = by_attrs or [d for d in by_name if d in da.coords]
        if not candidates and axis != "time" and (grid := grid or _grid_coordinates(da)):
            found["lat"], found["lon"] = (str(d) for d in da[grid[0]].dims)
            break
        if not candidates and by_name:
            dim = by_name[0]
            raise UserError(
                f"{where}: the {what[axis]} dimension {dim} of variable {da.name!r} has no coordinate values "
                f"(no variable {dim} in the file), so its {'dates' if axis == 'time' else 'degrees'} are "
                f"unknown; add the {what[axis]} values to the file"
            )
        if not candidates:
            looked = {"time": "axis=T, standard_name=time or a CF time unit",
                      "lat": "standard_name=latitude or units=degrees_north",
                      "lon": "standard_name=longitude or units=degrees_east"}[axis]
            raise UserError(
                f"{where}: variable {da.name!r} has dimensions ({', '.join(map(str, da.dims))}) and none is "
                f"{'a' if axis == 'time' else 'the'} {what[axis]} "
                f"axis (looked for {looked}, or a name like {_NAMES[axis][0]}); fix the file's attributes"
            )
        found[axis] = str(candidates[0])
    return found, grid


def _extra_kind(da: xr.DataArray, dim: str) -> str | None:
    """``"level"`` for a vertical axis, ``"member"`` for an ensemble axis (CF attributes, then names)."""
    attrs = {k: str(v).lower() for k, v in (da[dim].attrs if dim in da.coords else {}).items()}
    name = str(dim).lower()
    if attrs.get("axis") == "z" or "positive" in attrs or attrs.get("standard_name") in _VERTICAL or name in (
            "level", "lev", "plev", "depth", "height", "z", "pressure", "isobaric"):
        return "level"
    if attrs.get("standard_name") == "realization" or name in ("member", "ensemble", "realization", "ens",
                                                               "number", "member_id"):
        return "member"
    return None


def _matching(values: np.ndarray, wanted: float | str) -> np.ndarray:
    if values.dtype.kind in "USO" or isinstance(wanted, str):
        return np.flatnonzero(values.astype(str) == str(wanted))
    return np.flatnonzero(np.isclose(values.astype(float), float(wanted)))


def _listed(values: np.ndarray) -> str:
    return ", ".join(str(v) for v in values[:12]) + (" ..." if values.size > 12 else "")


def pick_extra_dims(da: xr.DataArray, axes: dict[str, str], choice: SelectSection | None, where: str) -> xr.DataArray:
    """Reduce every dimension besides time, lat and lon to one value.

    ``select.level`` picks the value of a vertical axis, ``select.member`` that
    of an ensemble axis; the value picked stays on the field as a scalar
    coordinate, so the results can say what was analysed.  A field that holds
    one level or member already (a dimension of length one, or a CF scalar
    coordinate) must hold the one asked for.  Other length-one dimensions
    simply drop.

    Raises
    ------
    UserError
        If a dimension is neither vertical nor ensemble, if a level or member
        is needed and not given (or not there), or if ``select.level`` /
        ``select.member`` is given for a field without that axis.
    """
    found: set[str] = set()
    for dim in [d for d in da.dims if d not in axes.values()]:
        kind = _extra_kind(da, dim)
        if da.sizes[dim] == 1 and kind is None:
            da = da.squeeze(dim, drop=True)
            continue
        wanted = getattr(choice, kind, None) if kind else None
        values = da[dim].values if dim in da.coords else np.arange(da.sizes[dim])
        if kind is None:
            raise UserError(f"{where}: variable {da.name!r} has a dimension {dim} ({da.sizes[dim]}) besides time, "
                            "latitude and longitude that is neither a vertical nor an ensemble axis; "
                            "extract one slice of it first")
        found.add(kind)
        if wanted is None and da.sizes[dim] == 1:
            da = da.squeeze(dim)
            continue
        if wanted is None:
            raise UserError(f"{where}: variable {da.name!r} has a {kind} dimension {dim} with values "
                            f"{_listed(values)}; choose one with select.{kind}")
        match = _matching(values, wanted)
        if len(match) == 0:
            raise UserError(f"select.{kind}: {wanted!r} is not a value of {dim} in {where}; there: {_listed(values)}")
        da = da.isel({dim: int(match[0])})
    for name in [c for c in da.coords if da[c].ndim == 0 and c not in da.dims]:
        kind = _extra_kind(da, name)
        if kind is None:
            continue
        found.add(kind)
        wanted = getattr(choice, kind, None)
        if wanted is not None and len(_matching(np.atleast_1d(da[name].values), wanted)) == 0:
            units = f" {da[name].attrs['units']}" if "units" in da[name].attrs else ""
            raise UserError(f"select.{kind}: {wanted!r} is not the {kind} of variable {da.name!r} in {where}, "
                            f"which holds {name} = {da[name].values}{units} only; set select.{kind} to that "
                            "value or remove it")
    for kind, axis in (("level", "vertical"), ("member", "ensemble")):
        if getattr(choice, kind, None) is not None and kind not in found:
            raise UserError(f"select.{kind}: {getattr(choice, kind)!r} is given, but variable {da.name!r} in "
                            f"{where} has no {axis} axis ({', '.join(map(str, da.dims))}); remove select.{kind}")
    return da


def _refuse_undecodable_times(path: str) -> None:
    """If ``path`` failed to open because a time variable's units cannot be turned into dates, say which."""
    try:
        raw = xr.open_dataset(path, engine=_engine(path), decode_times=False, decode_timedelta=False)
    except Exception:  # not a time problem: the caller reports the file as unreadable
        return
    with raw:
        for name, variable in raw.variables.items():
            units = str(variable.attrs.get("units", ""))
            if " since " not in f" {units.lower()} ":
                continue
            try:
                xr.decode_cf(xr.Dataset({f"{name}_": variable}))  # decodes the first and last values only
            except Exception:  # xarray and cftime each raise their own types
                calendar = variable.attrs.get("calendar", "standard")
                raise UserError(f"{path}: time variable {name!r} has units {units!r} with calendar {calendar!r}, "
                                "which cannot be turned into dates; give it CF time units such as "
                                "'days since 2000-01-01'") from None


def _open_one(path: str, variable: str) -> tuple[xr.DataArray, xr.Dataset]:
    try:
        ds = xr.open_dataset(path, engine=_engine(path), decode_timedelta=False)
    except Exception as err:  # netCDF4, h5py, zarr and xarray each raise their own types
        _refuse_undecodable_times(path)
        reason = str(err).splitlines()[0] if str(err) else type(err).__name__
        if is_zarr(path):
            raise UserError(f"{path}: cannot be read as a Zarr store ({reason}); check that the store is "
                            "complete") from None
        raise UserError(f"{path}: cannot be read as NetCDF ({reason}); check that the file is complete") from None
    if variable not in ds.data_vars:
        names = ", ".join(sorted(map(str, ds.data_vars))) or "none"
        raise UserError(f"{path}: no variable {variable!r}; variables there: {names}; set input.variable")
    da = ds[variable]
    _check_numeric(da, variable, path)
    return da, ds


def _unstored_chunks_note(path: str, variable: str) -> str | None:
    """A note when a Zarr store lacks chunk files of ``variable``: zarr reads them as its fill value, which is
    right for chunks left out on purpose (all fill) but hides a store copied in part."""
    import zarr

    array = zarr.open_array(path, path=variable, mode="r")
    missing = array.nchunks - array.nchunks_initialized
    if missing <= 0:
        return None
    return (f"{path}: {missing} of the {array.nchunks} chunks of {variable} are not stored, and are read as the "
            f"store's fill value {array.fill_value}; if the store was copied in part, copy it again")


def _check_numeric(da: xr.DataArray, variable: str, where: str) -> None:
    if not np.issubdtype(da.dtype, np.number) or np.issubdtype(da.dtype, np.complexfloating):
        kind = "text" if da.dtype.kind in "USO" else str(da.dtype)
        raise UserError(f"{where}: variable {variable!r} holds {kind} values, not numbers; set input.variable to a "
                        "numeric field")


def _with_cell_areas(da: xr.DataArray, ds: xr.Dataset, name: str | None, path: str) -> xr.DataArray:
    """Attach the file's cell areas as a ``cell_area`` coordinate: the variable named in the config
    (``input.cell_area``), else the one the field's CF ``cell_measures`` names, if the file has it."""
    measures = str(da.attrs.get("cell_measures", ""))
    named = name or dict(zip(measures.split()[::2], measures.split()[1::2])).get("area:")
    if not named:
        return da
    if named not in ds.variables:
        if name:
            raise UserError(f"{path}: no cell-area variable {name!r} (input.cell_area); variables there: "
                            f"{', '.join(sorted(map(str, ds.variables)))}")
        return da
    area = ds[named]
    horizontal = [d for d in da.dims if d in area.dims]
    if area.ndim != 2 or len(horizontal) != 2:
        raise UserError(f"{path}: cell-area variable {named!r} has dimensions {area.dims}; expected the field's "
                        "two horizontal dimensions")
    values = np.asarray(area.transpose(*horizontal).values, dtype=float)
    return da.assign_coords(cell_area=(tuple(horizontal), values))


def _stamp_at_interval_middles(da: xr.DataArray, ds: xr.Dataset, time: str) -> tuple[xr.DataArray, bool]:
    """Where the file gives time bounds (CF ``bounds``), stamp each step at the middle of its interval.

    A monthly mean stamped at the end of its month (2000-02-01 00:00 for January) would otherwise be
    counted as February by every month-based step; the middle always lies in the right month.
    """
    bounds = ds[time].attrs.get("bounds") or ds[time].encoding.get("bounds")
    if not bounds or bounds not in ds or ds[bounds].ndim != 2:
        return da, False
    lower, upper = ds[bounds].values[:, 0], ds[bounds].values[:, 1]
    middles = np.array([a + (b - a) / 2 for a, b in zip(lower, upper)])
    if np.array_equal(middles, ds[time].values):
        return da, False
    return da.assign_coords({time: (time, middles, ds[time].attrs)}), True


def _time_gaps(time: np.ndarray, shown: int = 3) -> list[str]:
    """Steps more than 1.5 times the usual spacing apart, as notes (gaps are allowed): each gap, or, when
    there are more than ``shown``, one note counting them and naming the longest."""
    if time.size < 3:
        return []
    days = np.array([(b - a) / np.timedelta64(1, "D") if isinstance(b - a, np.timedelta64)
                     else (b - a).total_seconds() / 86400 for a, b in zip(time[:-1], time[1:])])
    usual = np.median(days)
    gaps = np.flatnonzero(days > 1.5 * usual)
    if gaps.size > shown:
        longest = gaps[np.argmax(days[gaps])]
        return [f"gaps in time: {gaps.size} places where steps lie more than 1.5 times the usual {usual:g} day(s) "
                f"apart; the longest: nothing between {str(time[longest])[:10]} and {str(time[longest + 1])[:10]}"]
    return [f"gap in time: nothing between {str(time[i])[:10]} and {str(time[i + 1])[:10]}" for i in gaps]


_CALENDAR_SYNONYMS = {"gregorian": "standard", "365_day": "noleap", "366_day": "all_leap"}


def _calendar(encoding: dict) -> str:
    """A file's CF calendar (``standard`` when it names none), synonyms made one."""
    name = str(encoding.get("calendar", "standard")).strip().lower()
    return _CALENDAR_SYNONYMS.get(name, name)


def _check_time(time: xr.DataArray, ds: xr.Dataset, path: str) -> None:
    """Refuse a file without time steps, or whose time values are not dates (no CF time units)."""
    name = str(time.name)
    if time.size == 0:
        raise UserError(f"{path}: no time steps (its {name} dimension is empty); remove the file from input.paths")
    if np.issubdtype(time.dtype, np.datetime64) or hasattr(time.values.flat[0], "calendar"):
        return
    units = ds[name].attrs.get("units")
    if units is None:
        raise UserError(f"{path}: time variable {name!r} has no units, so its values are not dates; give it CF "
                        "time units such as 'days since 2000-01-01'")
    raise UserError(f"{path}: time variable {name!r} has units {units!r}, not CF time units ('UNIT since DATE'), "
                    "so its values are not dates; give it units such as 'days since 2000-01-01'")


def _first_disorder(values: np.ndarray) -> int | None:
    """Index of the first value that breaks a strictly increasing or strictly decreasing order, if any."""
    if values.size < 2:
        return None
    direction = np.sign(values[1] - values[0]) or 1
    broken = np.flatnonzero(direction * np.diff(values) <= 0)
    return int(broken[0]) + 1 if broken.size else None


def _in_grid_order(da: xr.DataArray, names: dict[str, str], path: str) -> tuple[xr.DataArray, str | None]:
    """Check the grid's coordinates and put longitudes stored rolled round the circle in increasing order.

    Latitudes must be finite, within -90..90 and strictly monotonic, in either
    direction.  Latitudes out of order are refused rather than sorted: no
    archive convention stores them so, and such an axis most often means a
    file was written or joined wrongly, which sorting would hide.  Longitudes
    may increase or decrease.  Longitudes that increase round the circle from
    some meridian (180 ... 357.5, 0 ... 177.5, as some archives store them) are
    rolled to increase from their smallest value, lazily, and the second value
    returned says so; any other order is refused.  A global grid's last
    longitude repeating the first is left for :func:`rechunked` to drop.
    """
    if GRID_LAT in da.coords:
        lat = da[GRID_LAT].values
        if np.nanmin(lat) < -90 or np.nanmax(lat) > 90:
            raise UserError(f"{path}: latitude {names['lat']} holds values from {np.nanmin(lat):g} to "
                            f"{np.nanmax(lat):g}, outside -90..90; fix the file's latitudes")
        return da, None
    lat, lon = (np.asarray(da[axis].values, dtype=float) for axis in ("lat", "lon"))
    for axis, values in (("lat", lat), ("lon", lon)):
        if not np.all(np.isfinite(values)):
            raise UserError(f"{path}: {names[axis]} holds missing or infinite values; give every "
                            f"{'row its latitude' if axis == 'lat' else 'column its longitude'}")
    if lat.min() < -90 or lat.max() > 90:
        raise UserError(f"{path}: latitude {names['lat']} holds values from {lat.min():g} to {lat.max():g}, "
                        "outside -90..90; fix the file's latitudes")
    if (row := _first_disorder(lat)) is not None:
        raise UserError(f"{path}: latitudes {names['lat']} are out of order ({lat[row - 1]:g} then {lat[row]:g} at "
                        f"row {row}); store them increasing or decreasing")
    repeats = lon.size > 2 and np.isclose((lon[-1] - lon[0]) % 360, 0) and not np.isclose(lon[-1], lon[0])
    body = lon[:-1] if repeats else lon
    column = _first_disorder(body)
    if column is None:
        return da, None
    descents = np.flatnonzero(np.diff(body) < 0)
    start = int(descents[0]) + 1 if descents.size == 1 and not repeats else 0
    rolled = np.roll(body, -start)
    if not start or not np.all(np.diff(rolled) > 0) or not np.all(np.diff((body - body[0]) % 360) > 0):
        raise UserError(f"{path}: longitudes {names['lon']} are out of order ({lon[column - 1]:g} then "
                        f"{lon[column]:g} at column {column}); store them increasing or decreasing")
    note = (f"longitudes stored from {lon[0]:g} round to {lon[-1]:g} were put in increasing order "
            f"({rolled[0]:g} to {rolled[-1]:g}; the grid covers {lon_span(lon)})")
    return da.isel(lon=np.roll(np.arange(lon.size), -start)), note


def lon_span(lon: np.ndarray) -> str:
    """The arc of the circle that longitudes cover, from the end of their widest gap, eastward: a box across
    the dateline stored as -180..180 covers "140 to 210 degrees east", not "-178 to 180".

    >>> lon_span(np.array([140.0, 160, 180, -170, -150]))
    '140 to 210 degrees east'
    """
    east = np.sort(np.mod(lon, 360.0))
    gaps = np.diff(np.append(east, east[0] + 360))
    if east.size > 1 and gaps.max() < 1.5 * np.median(gaps):  # no gap: the whole circle
        return f"the whole circle ({np.min(lon):g} to {np.max(lon):g})"
    start = (int(np.argmax(gaps)) + 1) % east.size
    first, last = east[start], east[start - 1] + (360 if start else 0)
    if first >= 180 and last > 360:  # a box east of 180 reads better on -180..180
        first, last = first - 360, last - 360
    return f"{first:g} to {last:g} degrees east"


def _valid_note(variable: str, valid: tuple[float, float]) -> str:
    return (f"values of {variable} outside its valid range {valid[0]:g} to {valid[1]:g} (CF valid_range, valid_min, "
            "valid_max) are taken as missing and counted with the missing values below; if that range is stale and "
            "real values lie outside it, correct or remove the attribute")


def valid_range(da: xr.DataArray) -> tuple[float, float] | None:
    """The range of valid values the field's CF attributes declare (``valid_range``, or ``valid_min`` and
    ``valid_max``), in the field's unpacked units, or None when it declares none.

    CF 1.10 section 2.5.1: values outside it are missing.  A range stored in the packed integer type of
    a packed variable is in packed units, and is unpacked as the values are.

    >>> valid_range(xr.DataArray([1.0], attrs={"valid_min": 0.0}))
    (0.0, inf)
    """
    attrs = da.attrs
    given = np.ravel(attrs["valid_range"]) if "valid_range" in attrs else None
    if given is not None and given.size != 2:
        return None
    if given is None and "valid_min" not in attrs and "valid_max" not in attrs:
        return None
    low, high = (given if given is not None else
                 [np.asarray(attrs.get("valid_min", -np.inf)), np.asarray(attrs.get("valid_max", np.inf))])
    packed = da.encoding.get("dtype")
    bounds = []
    for value in (low, high):
        value = np.asarray(value)
        if not np.issubdtype(value.dtype, np.number):
            return None
        if packed is not None and np.dtype(packed).kind in "iu" and value.dtype.kind in "iu" and (
                "scale_factor" in da.encoding or "add_offset" in da.encoding):
            value = value * da.encoding.get("scale_factor", 1.0) + da.encoding.get("add_offset", 0.0)
        bounds.append(float(value))
    return bounds[0], bounds[1]


def _grid_mapping(da: xr.DataArray, ds: xr.Dataset) -> xr.DataArray | None:
    """The grid-mapping variable the field names (CF ``grid_mapping``), if the file holds it."""
    name = str(da.attrs.get("grid_mapping", da.encoding.get("grid_mapping", ""))).split(":")[0].strip()
    if name in ds.variables and "grid_mapping_name" in ds[name].attrs:
        return ds[name]
    return None


# spellings of one unit (UDUNITS-2's names, symbols and aliases for the temperatures archives use, from
# memory): compared as one, since they name the same values
_SAME_UNIT = {spelling: unit for unit, spellings in {
    "K": ("k", "kelvin", "kelvins", "degk", "deg_k", "degreek", "degree_k", "degrees_k", "degree_kelvin",
          "degrees_kelvin"),
    "degC": ("degc", "deg_c", "celsius", "degreec", "degree_c", "degrees_c", "degree_celsius", "degrees_celsius",
             "°c"),
}.items() for spelling in spellings}


def units_key(units: object) -> str | None:
    """The units attribute as compared between files and against a training's: stripped, and a known
    spelling of kelvin or degrees Celsius as one (``kelvin`` and ``K`` name the same values); ``None``
    without units."""
    if units is None:
        return None
    text = str(units).strip()
    return _SAME_UNIT.get(text.lower().replace(" ", "_"), text)


def _check_agreement(first: tuple, other: tuple, variable: str) -> None:
    """Refuse files whose calendars or units differ from those of the first file (both named)."""
    (path_a, a, encoding_a, *_), (path_b, b, encoding_b, *_) = first, other
    calendar_a, calendar_b = _calendar(encoding_a), _calendar(encoding_b)
    kind_a, kind_b = a["time"].dtype.kind, b["time"].dtype.kind  # "M": numpy dates, "O": cftime dates
    # standard and proleptic_gregorian differ only before 1582-10-15, and xarray gives dates in numpy's
    # datetime64 only after it: then both name the same days
    gregorian = {calendar_a, calendar_b} <= {"standard", "proleptic_gregorian"} and kind_a == kind_b == "M"
    if calendar_a != calendar_b and not gregorian:
        raise UserError(f"{path_b}: its calendar {calendar_b!r} differs from the calendar {calendar_a!r} of "
                        f"{path_a}; convert the files to one calendar")
    if kind_a != kind_b:
        raise UserError(f"{path_b}: its dates (from {_date(b['time'].values[0])}) cannot share one time axis with "
                        f"those of {path_a} (from {_date(a['time'].values[0])}) in calendar {calendar_a!r}: dates "
                        "before 1582-10-15 or outside 1678-2262 are stored differently; analyse them separately")
    units_a, units_b = (str(d.attrs["units"]).strip() if "units" in d.attrs else None for d in (a, b))
    if units_key(units_a) != units_key(units_b):
        said_a = f"in {units_a!r}" if units_a else "without units"
        said_b = f"is in {units_b!r}" if units_b else "has no units"
        raise UserError(f"{path_b}: {variable} {said_b}, but {said_a} in {path_a}; give every file the same "
                        "units (convert the values, not just the attribute)")


def _standard_piece(da: xr.DataArray, ds: xr.Dataset, axes: dict[str, str], grid: tuple[str, str] | None,
                    spec: InputSection, choice: SelectSection | None, where: str):
    """One file's field (or an in-memory one) checked and put in the standard form: dimensions named
    ``time``, ``lat``, ``lon`` (in the file's order: :func:`rechunked` puts them in that one), an extra axis
    reduced, a curvilinear grid's coordinates renamed, cell areas attached,
    stamps at the middles of the time bounds, longitudes in order.  ``ds`` holds the variables the field's
    attributes name.  Returns the field, whether its stamps moved, the note on rolled longitudes (or None)
    and its grid-mapping variable (or None)."""
    _check_time(da[axes["time"]], ds, where)
    da = pick_extra_dims(da, axes, choice, where)
    mapping = None
    if grid:  # the rows and columns keep their 1-D coordinates (rotated ones are not latitudes) under own names
        rows = {inner: (dim, da[dim].values, da[dim].attrs)
                for inner, dim in ((GRID_Y, axes["lat"]), (GRID_X, axes["lon"])) if dim in da.coords}
        da = da.drop_vars([axes["lat"], axes["lon"]], errors="ignore")
        da = da.rename({grid[0]: GRID_LAT, grid[1]: GRID_LON}).assign_coords(rows)
        mapping = _grid_mapping(da, ds)
    da = _with_cell_areas(da, ds, spec.cell_area, where)
    da, restamped = _stamp_at_interval_middles(da, ds, axes["time"])
    da = da.rename({v: k for k, v in axes.items()})  # put in (time, lat, lon) order once cut: see rechunked
    da, rolled = _in_grid_order(da, axes, where)
    return da, restamped, rolled, mapping


def _check_steps_in_order(da: xr.DataArray, where: str) -> None:
    steps = da["time"].values
    if steps.size > 1 and not all(b > a for a, b in zip(steps[:-1], steps[1:])):
        at = next(i for i in range(1, steps.size) if not steps[i] > steps[i - 1])
        raise UserError(f"{where}: time step {at} ({str(steps[at])[:19]}) repeats or goes back in time; "
                        "remove the duplicate or sort the steps")


def open_field(spec: InputSection, choice: SelectSection | None = None) -> OpenedField:
    """Open ``spec.variable`` from every file of ``spec.paths`` as one lazy field.

    Files are ordered by their first time step; their grids, calendars and
    units must agree and their time steps must not overlap.  A vertical or
    ensemble dimension is reduced to ``choice.level`` / ``choice.member``.  Only
    coordinates and attributes are read, so every refusal here costs no read of
    the field.  The field is chunked as ``spec.chunks`` says; :func:`rechunked`
    cuts it otherwise.
    """
    paths = expand_paths(spec.paths)
    pieces, moved, notes, datasets = [], [], [], []
    names: dict[str, str] = {}
    grid_names, grid_mapping = None, None
    for path in paths:
        da, ds = _open_one(path, spec.variable)
        datasets.append(ds)
        if is_zarr(path) and (unstored := _unstored_chunks_note(path, spec.variable)):
            notes.append(unstored)
        valid = valid_range(da)
        if valid is not None and _valid_note(spec.variable, valid) not in notes:
            notes.append(_valid_note(spec.variable, valid))
        axes, grid = find_axes(da, path)
        storage = storage_of(da, axes)
        if names and axes != names:
            raise UserError(f"{path}: axes are named {axes}, but {paths[0]} names them {names}; make them agree")
        names = axes
        da, restamped, rolled, mapping = _standard_piece(da, ds, axes, grid, spec, choice, path)
        if grid:
            grid_names, grid_mapping = grid, mapping
        moved.append(restamped)
        if rolled and rolled not in notes:
            notes.append(rolled)
        _check_steps_in_order(da, path)
        pieces.append((path, da, ds[axes["time"]].encoding, storage, valid))
        _check_agreement(pieces[0], pieces[-1], spec.variable)
    pieces.sort(key=lambda p: p[1]["time"].values[0])
    for (path_a, a, *_), (path_b, b, *_) in zip(pieces, pieces[1:]):
        for axis in ("lat", "lon", GRID_LAT, GRID_LON):
            if axis not in a.coords:
                continue
            if a[axis].shape != b[axis].shape or not np.allclose(a[axis].values, b[axis].values):
                raise UserError(f"{path_b}: its {names.get(axis, axis)} grid differs from that of {path_a}; "
                                "regrid the files to one grid")
        if b["time"].values[0] <= a["time"].values[-1]:
            raise UserError(f"{path_b}: its time steps overlap those of {path_a}; remove the duplicate steps")
    files = [InputFile(str(Path(p).resolve()), _size_of(p), os.stat(p).st_mtime) for p in paths]
    encoding = {k: v for k, v in pieces[0][2].items() if k in ("units", "calendar", "dtype")}
    opened = OpenedField(xr.DataArray(), files, names, encoding, pieces=[p[1] for p in pieces], grid=grid_names,
                         grid_mapping=grid_mapping, opening_notes=notes, storages=[p[3] for p in pieces],
                         datasets=datasets, valid=[p[4] for p in pieces])
    opened.restamped = any(moved)
    return rechunked(opened, spec.chunks)


def array_name(data: xr.DataArray) -> str:
    """How an in-memory field is named in messages, where a file's path would be."""
    name = getattr(data, "name", None)
    return f"DataArray {str(name)!r}" if name is not None else "the DataArray"


def field_from_array(data: xr.DataArray, spec: InputSection, choice: SelectSection | None = None) -> OpenedField:
    """An in-memory (or lazily computed) field as :func:`open_field` gives a file's: the same checks and the
    same standard form, so that everything after opening treats both alike.

    ``data`` needs time, latitude and longitude axes that :func:`find_axes` recognises; ``spec.chunks``
    cuts it into dask chunks (a numpy-backed array becomes a dask one, nothing is computed).  The results
    list no input file.

    Raises
    ------
    UserError
        If ``data`` is not a numeric DataArray with dated time steps in order on a grid climodes reads.
    """
    if not isinstance(data, xr.DataArray):
        raise UserError(f"expected an xarray.DataArray with time, latitude and longitude axes; got "
                        f"{type(data).__name__}")
    where = array_name(data)
    _check_numeric(data, spec.variable, where)
    axes, grid = find_axes(data, where)
    known = data.coords.to_dataset()
    da, restamped, rolled, mapping = _standard_piece(data, known, axes, grid, spec, choice, where)
    _check_steps_in_order(da, where)
    encoding = {k: v for k, v in data[axes["time"]].encoding.items() if k in ("units", "calendar", "dtype")}
    valid = valid_range(data)
    notes = [rolled] if rolled else []
    notes += [_valid_note(spec.variable, valid)] if valid is not None else []
    opened = OpenedField(xr.DataArray(), [], axes, encoding, pieces=[da], grid=grid, grid_mapping=mapping,
                         opening_notes=notes, valid=[valid])
    opened.restamped = restamped
    return rechunked(opened, spec.chunks)


def rechunked(opened: OpenedField, chunks: dict[str, int]) -> OpenedField:
    """The same field with dask chunks of ``chunks`` (axis to length; -1 or absent: whole).

    Chunks are cut on each file's lazy array before the files are joined, so a
    chunk reads only its own part of a file; cutting a dask chunk afterwards
    would still read all of it.  They are cut in the file's own order of
    dimensions and put in ``(time, lat, lon)`` order after, as dask arrays: a
    lazily transposed file (stored time last) read in blocks read whole
    (measured: 25 times a block's memory).  The streaming solvers use this for
    their blocks of latitude rows with every time step.
    """
    sizes = {axis: chunks.get(axis, -1) for axis in ("time", "lat", "lon")}
    valid = opened.valid or [None] * len(opened.pieces)
    data = xr.concat([_within_valid(piece.chunk(sizes).transpose("time", "lat", "lon"), bounds)
                      for piece, bounds in zip(opened.pieces, valid)],
                     dim="time", coords="minimal", compat="override", join="override")
    notes = [*opened.opening_notes, *_time_gaps(data["time"].values)]
    if opened.restamped:
        notes.append("time stamps moved to the middles of the files' time bounds")
    lon = data["lon"].values if "lon" in data.coords else np.array([])
    if lon.size > 2 and np.isclose((lon[-1] - lon[0]) % 360, 0) and not np.isclose(lon[-1], lon[0]):
        data = data.isel(lon=slice(0, -1))
        notes.append(f"dropped longitude {lon[-1]:g}: it repeats {lon[0]:g} on a global grid")
    return dataclasses.replace(opened, data=data, notes=notes)


def _within_valid(piece: xr.DataArray, bounds: tuple[float, float] | None) -> xr.DataArray:
    """``piece`` with the values outside its valid range (:func:`valid_range`) missing, lazily."""
    if bounds is None:
        return piece
    return piece.where((piece >= bounds[0]) & (piece <= bounds[1])).assign_attrs(piece.attrs)


def select(opened: OpenedField, spec: SelectSection) -> xr.DataArray:
    """Cut the region, period and months of ``spec`` out of the opened field.

    ``lon: [W, E]`` works with 0..360 and -180..180 data alike; with W > E the
    box crosses the dateline.  On a regular grid the selected longitudes are
    put in increasing order, counting east from W, so the result is always a
    monotonic axis; on a curvilinear grid the rows and columns holding the box
    are kept and the points outside it are marked missing.
    """
    da = opened.data
    if GRID_LAT in da.coords:
        if spec.lat is not None or spec.lon is not None:
            da = _select_curvilinear(da, spec)
    else:
        if spec.lat is not None:
            lat = da["lat"].values
            da = da.isel(lat=np.flatnonzero((lat >= spec.lat[0]) & (lat <= spec.lat[1])))
            if da.sizes["lat"] == 0:
                raise UserError(f"select.lat: {spec.lat} holds no latitude of the grid "
                                f"({lat.min():g} to {lat.max():g}); widen the band")
        if spec.lon is not None:
            da = _select_lon(da, *spec.lon)
    if spec.period is not None:
        kept = np.flatnonzero(in_period(da["time"].values, spec.period, "select.period"))
        da = da.isel(time=slice(kept[0], kept[-1] + 1) if kept.size else slice(0))  # steps are in time order
        if da.sizes["time"] == 0:
            raise UserError(f"select.period: {spec.period} holds no time step of the input; "
                            f"it runs {_date(opened.data['time'].values[0])} to {_date(opened.data['time'].values[-1])}")
    if spec.months is not None:
        da = da.isel(time=np.flatnonzero(np.isin(da["time"].dt.month.values, spec.months)))
        if da.sizes["time"] == 0:
            raise UserError(f"select.months: {spec.months} holds no time step of the selected period")
    return da


def _in_lon_box(lon: np.ndarray, west: float, east: float) -> np.ndarray:
    width = east - west if west < east else east - west + 360
    return ((lon - west) % 360 <= width + 1e-9) | (width >= 360)


def _select_curvilinear(da: xr.DataArray, spec: SelectSection) -> xr.DataArray:
    """Keep the rows and columns that hold points of the box, and mark the points outside it missing."""
    lat, lon = da[GRID_LAT].values, da[GRID_LON].values
    inside = np.ones(lat.shape, dtype=bool)
    if spec.lat is not None:
        inside &= (lat >= spec.lat[0]) & (lat <= spec.lat[1])
    if spec.lon is not None:
        inside &= _in_lon_box(lon, *spec.lon)
    if not inside.any():
        raise UserError(f"select: the box lat {spec.lat}, lon {spec.lon} holds no point of the grid "
                        f"(lat {lat.min():g} to {lat.max():g}, lon {lon.min():g} to {lon.max():g}); widen it")
    rows, cols = np.flatnonzero(inside.any(axis=1)), np.flatnonzero(inside.any(axis=0))
    box = {"lat": slice(rows[0], rows[-1] + 1), "lon": slice(cols[0], cols[-1] + 1)}
    mask = xr.DataArray(inside[box["lat"], box["lon"]], dims=("lat", "lon"))
    return da.isel(box).where(mask)


def _select_lon(da: xr.DataArray, west: float, east: float) -> xr.DataArray:
    lon = da["lon"].values
    width = east - west if west < east else east - west + 360
    offset = (lon - west) % 360
    if width >= 360:
        keep = np.argsort(offset, kind="stable")
    else:
        inside = np.flatnonzero(offset <= width + 1e-9)
        keep = inside[np.argsort(offset[inside], kind="stable")]
    if keep.size == 0:
        raise UserError(f"select.lon: [{west:g}, {east:g}] holds no longitude of the grid (it covers "
                        f"{lon_span(lon)}); widen the box")
    out = da.isel(lon=keep)
    if not np.all(np.diff(lon[keep]) > 0):
        out = out.assign_coords(lon=("lon", west + offset[keep], da["lon"].attrs))
    return out


def _date(value) -> str:
    return str(value)[:10]
