"""Write the results: a CF-1.10 ``modes.nc`` with its provenance, into a results folder that is
claimed at the start and appears complete or not at all.

A results folder is climodes' own: it carries a manifest (:data:`MARK`) naming
the run and every file it wrote, and it is the only kind of folder climodes
ever replaces (:func:`check_output_dir` says which folders are refused).
:func:`results_folder` claims it, stages the files beside it and renames them
into place; :func:`write_file_atomically` does the same for a single file.
"""

from __future__ import annotations

import contextlib
import ctypes
import datetime as dt
import errno
import functools
import glob
import hashlib
import json
import os
import re
import secrets
import shutil
import signal
import socket
import stat
import sys
import threading
from pathlib import Path
from typing import Callable, Iterator

import dask.array
import numpy as np
import xarray as xr

from climodes import __version__
from climodes.config import RunSpec
from climodes.errors import UserError
from climodes.fields import OpenedField
from climodes.grid import GRID_LAT, GRID_LON, GRID_X, GRID_Y
from climodes.storage import READ_CACHE, Uncopied, keeping_chunks

FILL = 9.969209968386869e36  # the netCDF default fill for doubles
WHOLE_WRITE = 2**24  # bytes of an in-memory stack of maps written in one piece; bigger ones are written map by map


def _squared_units(units: str | None) -> dict:
    return {"units": f"({units})^2"} if units else {}


# a coordinate's CF attributes that stay true whatever part of it is kept: they say what it is, not what it holds
_LASTING_ATTRS = ("standard_name", "long_name", "units", "axis", "positive")


def lasting_attrs(attrs: dict) -> dict:
    """The attributes of an input coordinate that stay true in the results.

    An archive's ``actual_range``, ``valid_range``, ``valid_min`` and
    ``valid_max`` describe the values it stored (and are often stale there
    already), not the part the results keep; ``bounds`` and ``formula_terms``
    name variables the results do not hold.  Only what says what the
    coordinate is survives.

    >>> lasting_attrs({"units": "degrees_north", "actual_range": [-90, 90], "bounds": "lat_bnds"})
    {'units': 'degrees_north'}
    """
    return {k: v for k, v in attrs.items() if k in _LASTING_ATTRS}


def results_dataset(modes: xr.Dataset, opened: OpenedField, spec: RunSpec, extra: dict) -> xr.Dataset:
    """Dress the solver's modes as the CF results of the contract.

    ``extra`` carries ``errors``, ``separated``, ``method``, ``notes``,
    ``units``, ``compute``, ``elapsed`` and ``command`` (for the history).  Coordinates keep only their
    attributes that stay true (:func:`lasting_attrs`); the level or member
    analysed stays as a scalar coordinate; a curvilinear grid keeps its rows'
    and columns' 1-D coordinates and its grid mapping, where the input has them;
    every map variable names the grid mapping.
    """
    units = extra["units"]
    field_name = spec.input.variable
    long_name = opened.data.attrs.get("long_name", field_name)
    ds = modes.copy()
    ds = ds.assign_coords({name: c.variable for name, c in opened.data.coords.items() if c.ndim == 0})
    for name in ds.coords:
        ds[name].attrs = lasting_attrs(ds[name].attrs)
    curvilinear = GRID_LAT in ds.coords
    ds["mode"].attrs = {"long_name": "mode number, in order of decreasing variance", "units": "1"}
    lat, lon = (GRID_LAT, GRID_LON) if curvilinear else ("lat", "lon")
    ds[lat].attrs = {**lasting_attrs(opened.data[lat].attrs), "standard_name": "latitude", "units": "degrees_north"}
    ds[lon].attrs = {**lasting_attrs(opened.data[lon].attrs), "standard_name": "longitude", "units": "degrees_east"}
    if not curvilinear:
        ds["lat"].attrs["axis"], ds["lon"].attrs["axis"] = "Y", "X"
    ds["time"].attrs = {k: v for k, v in lasting_attrs(opened.data["time"].attrs).items() if k != "units"}
    ds["time"].attrs.update(standard_name="time", axis="T")
    ds["eof"].attrs = {
        "long_name": f"EOF map of {long_name}: regression of the anomaly on the standardised PC",
        **({"units": units} if units else {}),
        "comment": "anomaly ~= sum over mode of pc * eof; NaN where the point was not used. "
                   "The sign of a mode is arbitrary; climodes makes the largest absolute value of each map positive.",
    }
    ds["pc"].attrs = {"long_name": f"standardised principal component of {long_name}", "units": "1",
                      "comment": "zero mean and unit variance (ddof=1) over the analysed time steps"}
    ds["eigenvalue"].attrs = {"long_name": "eigenvalue of the area-weighted covariance matrix",
                              **_squared_units(units),
                              "total_variance": float(extra["total_variance"])}
    ds["variance_explained"].attrs = {"long_name": "fraction of the weighted total variance explained by the mode",
                                      "units": "1"}
    ds["variance_explained_error"] = ("mode", extra["errors"] / extra["total_variance"])
    ds["variance_explained_error"].attrs = {
        "long_name": "sampling error of variance_explained (North et al. 1982)",
        "units": "1",
        "comment": "variance_explained * sqrt(2 / effective_sample_size), with each mode's own effective_sample_size",
    }
    ds["separated"] = ("mode", extra["separated"].astype(np.int8))
    ds["separated"].attrs = {
        "long_name": "mode farther from each neighbour than the larger of the two modes' sampling errors "
                     "(North's rule of thumb)",
        "flag_values": np.array([0, 1], dtype=np.int8),
        "flag_meanings": "mixed_with_a_neighbour separated",
    }
    mapping = None
    if not curvilinear:  # a curvilinear grid has no geotransform: viewers place it by its 2-D coordinates
        import pyproj

        mapping, ds["crs"] = "crs", xr.DataArray(np.int32(0), attrs=pyproj.CRS("EPSG:4326").to_cf())
    elif opened.grid_mapping is not None:  # the input's own mapping (a rotated pole, a projection)
        mapping = str(opened.grid_mapping.name)
        ds[mapping] = xr.DataArray(np.int32(0), attrs=dict(opened.grid_mapping.attrs))
    if mapping:
        ds[mapping].encoding["coordinates"] = None  # a grid mapping describes the grid, not values at a level
    if mapping:  # every map variable names it
        for name, var in ds.data_vars.items():
            if {"lat", "lon"} <= set(var.dims):
                ds[name].attrs["grid_mapping"] = mapping
    ds = ds.rename({k: v for k, v in opened.names.items() if k != v})
    if curvilinear:
        ds = ds.rename({GRID_LAT: opened.grid[0], GRID_LON: opened.grid[1]})
        rows = {opened.names["lat"]: GRID_Y, opened.names["lon"]: GRID_X}
        ds = ds.drop_vars([GRID_Y, GRID_X], errors="ignore").assign_coords(
            {dim: (dim, ds[inner].values, ds[inner].attrs) for dim, inner in rows.items() if inner in ds.coords})
    if "time_bnds" in ds:  # each step is a mean over the interval its bounds give
        time_name = opened.names["time"]
        ds[time_name].attrs["bounds"] = "time_bnds"
        ds["pc"].attrs["cell_methods"] = f"{time_name}: mean"
    ds.attrs = provenance(spec, opened, extra)
    return ds


def projection_dataset(variables: xr.Dataset, opened: OpenedField, spec: RunSpec, extra: dict,
                       bounds: dict[str, xr.Variable], results: Path, trained: xr.Dataset) -> xr.Dataset:
    """Dress a projection's variables (:func:`climodes.reuse.projection_variables`) as CF results.

    The time axis keeps the new field's name, lasting attributes and (for means) bounds; the global
    attributes are the run's provenance for the new field (``extra`` as for :func:`provenance`) and name
    the results file projected onto.
    """
    ds = variables.assign_coords(bounds)
    ds["mode"].attrs = {"long_name": "mode number of the modes projected onto", "units": "1"}
    ds["time"].attrs = {k: v for k, v in lasting_attrs(opened.data["time"].attrs).items() if k != "units"}
    ds["time"].attrs.update(standard_name="time", axis="T")
    if "time_bnds" in ds.coords:
        ds = ds.reset_coords("time_bnds")
        ds["time"].attrs["bounds"] = "time_bnds"
        for name in ("pc", "congruence", "unexplained_fraction"):
            ds[name].attrs["cell_methods"] = "time: mean"
    if opened.names["time"] != "time":
        ds = ds.rename({"time": opened.names["time"]})
    made = provenance(spec, opened, extra, spec.projection_yaml())
    ds.attrs = {
        **made,
        "title": f"{spec.input.variable} projected onto the modes of variability of {results}",
        "history": f"{made['date_created']}: {extra['command']}",
        "references": "Lorenzo-Seva and ten Berge 2006, Methodology 2, 57-64 (congruence coefficient)",
        "climodes_results": str(results),
        "climodes_results_config_sha256": trained.attrs.get("climodes_config_sha256", "unknown"),
    }
    return ds


def provenance(spec: RunSpec, opened: OpenedField, extra: dict, config_text: str | None = None) -> dict:
    """Global attributes that say where the results came from and how to make them again (``config_text``:
    the config as it was used, by default the whole of ``spec``)."""
    config_text = config_text or spec.to_yaml()
    now = dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat()
    files = "\n".join(
        f"{f.path} size={f.size} modified="
        f"{dt.datetime.fromtimestamp(f.modified, dt.timezone.utc).replace(microsecond=0).isoformat()}"
        for f in opened.files
    )
    return {
        "Conventions": "CF-1.10",
        "title": f"Leading modes of variability of {spec.input.variable}",
        "institution": "unknown (produced by climodes)",
        "source": f"climodes {__version__}",
        "history": f"{now}: {extra['command']}",
        "references": "North et al. 1982, Mon. Wea. Rev. 110, 699-706 (sampling errors); Bretherton et al. 1999, "
                      "J. Climate 12, 1990-2009 (effective sample sizes)",
        "date_created": now,
        "climodes_method": extra["method"],
        "climodes_compute": extra["compute"],
        "climodes_config": config_text,
        "climodes_config_sha256": hashlib.sha256(config_text.encode()).hexdigest(),
        "climodes_input_files": files,
        "climodes_points": extra["points"],
        "climodes_notes": "\n".join(extra["notes"]) or "none",
        "climodes_python": sys.version.split()[0],
        "climodes_elapsed_seconds": float(extra["elapsed"]),
    }


def write_netcdf(ds: xr.Dataset, path: Path, time_encoding: dict, time_name: str | None = None) -> None:
    """Write ``ds`` as NetCDF-4 with CF-friendly encodings (no fill values on coordinates); ``time_name``
    (by default the time axis of ``pc``) gets ``time_encoding``.

    A dask-backed variable is written chunk by chunk, each map of it a NetCDF chunk of its own; so is an
    in-memory stack of maps of more than :data:`WHOLE_WRITE` bytes (the fitted climatology of a big grid),
    which written whole would be copied by the encoding and the library's conversions on the way (measured:
    1.5 times its size more).  SIGINT and SIGTERM wait until the file is closed: an interruption inside
    xarray's writer can leave its file lock taken, and the close that follows would then wait for ever.
    """
    ds = ds.copy()
    for name, var in ds.data_vars.items():
        if var.chunks is None and var.ndim >= 3 and var.nbytes > WHOLE_WRITE:
            maps = dask.array.from_array(Uncopied(var.values), chunks=(1, *var.shape[1:]), asarray=False)
            ds[name] = var.copy(data=maps)
    encoding = {name: {"_FillValue": None} for name in ds.coords}
    for name, var in ds.data_vars.items():
        encoding[name] = {"_FillValue": FILL if var.dtype.kind == "f" else None}
        if var.ndim >= 2:
            encoding[name].update(zlib=True, complevel=1)
        if var.chunks:
            encoding[name]["chunksizes"] = (1, *var.shape[1:])
    time_name = time_name or next(d for d in ds["pc"].dims if d != "mode")
    encoding[time_name].update(time_encoding)
    # a file written chunk by chunk, each chunk once, gains nothing from netCDF-C's 64 MiB chunk cache, which
    # would fill with chunks written already (64 MiB more for a big field): the small one of the readers
    with _signals_held(act=True), keeping_chunks(READ_CACHE):
        ds.to_netcdf(path, format="NETCDF4", encoding=encoding)


def _regular(values: np.ndarray) -> bool:
    steps = np.diff(values)
    return values.size < 2 or bool(np.allclose(steps, steps[0], rtol=1e-5, atol=1e-8))


def check_geotiff_grid(field: xr.DataArray) -> None:
    """A GeoTIFF holds a regular grid of known spacing only; say so before any work is done."""
    if GRID_LAT in field.coords:
        raise UserError("output.formats: geotiff needs a regular latitude-longitude grid, and this one is "
                        "curvilinear (2-D latitudes); drop geotiff (modes.nc carries the 2-D coordinates)")
    if field.sizes["lat"] < 2 or field.sizes["lon"] < 2:
        raise UserError(f"output.formats: geotiff needs the grid spacing, which a grid of {field.sizes['lat']} "
                        f"latitude(s) x {field.sizes['lon']} longitude(s) does not give; drop geotiff or select at "
                        "least two latitudes and two longitudes")
    for name, values in (("latitude", field["lat"].values), ("longitude", field["lon"].values)):
        if not _regular(values):
            raise UserError(f"output.formats: geotiff needs a regularly spaced grid, but the {name} spacing "
                            f"varies ({np.diff(values).min():g} to {np.diff(values).max():g} degrees); "
                            "drop geotiff or regrid the input")


def geotiff_layout(eof: xr.DataArray) -> xr.DataArray:
    """``eof`` north-up on longitudes -180..180, unless that would split a box across the dateline."""
    _, lat, lon = eof.dims
    wrapped = (eof[lon].values + 180) % 360 - 180
    order = np.argsort(wrapped, kind="stable")
    if _regular(wrapped[order]):
        eof = eof.isel({lon: order}).assign_coords({lon: (lon, wrapped[order], eof[lon].attrs)})
    return eof.sortby(lat, ascending=False)


def write_geotiff(ds: xr.Dataset, path: Path) -> None:
    """Write the EOF maps as one north-up, DEFLATE-compressed GeoTIFF band per mode (EPSG:4326, NaN nodata).

    SIGINT and SIGTERM wait until the file is closed, as for :func:`write_netcdf`.
    """
    import rasterio
    import rioxarray  # noqa: F401  (registers the .rio accessor)

    eof = geotiff_layout(ds["eof"])
    _, lat, lon = eof.dims
    bands = xr.DataArray(eof.values.astype(np.float32), dims=("band", "y", "x"),
                         coords={"band": ds["mode"].values, "y": eof[lat].values, "x": eof[lon].values})
    bands = bands.rio.write_crs("EPSG:4326").rio.write_nodata(np.nan)
    units = ds["eof"].attrs.get("units", "")
    tags = {name: str(value) for name, value in ds.attrs.items() if name != "Conventions"}
    with _signals_held(act=True):
        bands.rio.to_raster(path, driver="GTiff", compress="DEFLATE", tags={**tags, "units": units})
        with rasterio.open(path, "r+") as raster:
            for k in range(ds.sizes["mode"]):
                share = 100 * float(ds["variance_explained"][k])
                raster.set_band_description(k + 1, f"mode {k + 1} EOF ({units}), {share:.1f}% of variance")



# --- the results folder: its mark, its claim and the atomic replace
#
# A results folder carries a manifest (MARK) naming the run that wrote it and every file it wrote there;
# climodes replaces a folder only when that manifest lists everything in it.  A run claims its output at
# the start with an exclusive create of a claim file beside the final folder, writes into a hidden staging
# folder beside it, and at the end renames the staging folder into place without ever replacing anything
# but the results folder it checked at the start (Linux renameat2 with RENAME_NOREPLACE or RENAME_EXCHANGE).
# The claim, the staging folder and a single file's temporary name carry the run's host and pid, so the
# next run can tell the leftovers of a killed run (same host, pid no longer alive) from a running one.

MARK = ".climodes-results.json"  # the manifest inside every results folder
_KIND = "climodes results folder"  # the manifest's "kind": what tells it from any other JSON file
_RENAME_NOREPLACE, _RENAME_EXCHANGE = 1, 2  # linux/fs.h
_AT_FDCWD = -100


def _run_identity(config: Path) -> dict:
    """Who is writing: the run id, host, pid, start time, config and version carried by its claim and mark."""
    return {"kind": _KIND, "run_id": secrets.token_hex(8), "host": socket.gethostname(), "pid": os.getpid(),
            "started": _now(), "config": str(config) if config.is_file() else "(a config given from Python)",
            "climodes": __version__}


def _now() -> str:
    return dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat()


def _host_tag() -> str:
    return hashlib.sha256(socket.gethostname().encode()).hexdigest()[:8]


def _short(name: str) -> str:
    """``name`` as it appears in the hidden names beside it: a long one shortened, kept unique by a hash."""
    encoded = os.fsencode(name)
    if len(encoded) <= 100:
        return name
    return encoded[:60].decode(errors="ignore") + "-" + hashlib.sha256(encoded).hexdigest()[:16]


def _hidden_name(final: Path, what: str, suffix: str = "") -> str:
    """A fresh hidden name beside ``final`` (``what``: stage or temporary) saying which host and pid made it."""
    return f".{_short(final.name)}.climodes-{what}-{_host_tag()}-{os.getpid()}-{secrets.token_hex(4)}{suffix}"


def _claim_path(final: Path) -> Path:
    return final.parent / f".{_short(final.name)}.climodes-claim"


def _read_json(path: Path) -> dict | None:
    """The JSON object climodes wrote (its ``kind`` says so) in the regular file ``path``, else None."""
    try:
        if not stat.S_ISREG(os.lstat(path).st_mode):
            return None
        with open(path, "rb") as f:
            data = json.loads(f.read(1_000_000))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) and data.get("kind") == _KIND else None


def _plain(name: object) -> bool:
    """A relative path inside a results folder: no absolute path, no ``..``, no empty or ``.`` part."""
    return isinstance(name, str) and bool(name) and not name.startswith("/") and all(
        part not in ("", ".", "..") for part in name.split("/"))


def read_mark(folder: Path) -> dict | None:
    """The manifest of a finished results folder, or None if ``folder`` has none that climodes wrote."""
    mark = _read_json(Path(folder) / MARK)
    files = mark.get("files") if mark else None
    return mark if isinstance(files, list) and all(_plain(f) for f in files) else None


def listing(folder: Path) -> list[str]:
    """Every regular file below ``folder`` (but its manifest), as sorted ``/``-separated relative paths."""
    found = []
    for root, dirs, files in os.walk(folder):
        inside = Path(root).relative_to(folder)
        found += [(inside / name).as_posix() for name in files]
    return sorted(name for name in found if name != MARK)


def unlisted(folder: Path, mark: dict) -> list[str]:
    """What ``folder`` holds beyond the regular files its manifest lists and the sub-folders holding them
    (links, other files and folders included), as relative paths."""
    listed = set(mark["files"]) | {MARK}
    holding = {Path(name).parent.as_posix() for name in listed} - {"."}
    holding |= {parent.as_posix() for name in holding for parent in Path(name).parents if parent != Path(".")}
    found = []

    def look(inside: Path) -> None:
        with os.scandir(folder / inside) as entries:
            for entry in entries:
                name = (inside / entry.name).as_posix()
                if entry.is_dir(follow_symlinks=False) and name in holding:
                    look(inside / entry.name)
                elif name not in listed or not entry.is_file(follow_symlinks=False):
                    found.append(name)

    look(Path("."))
    return sorted(found)


def _pid_alive(pid: object) -> bool:
    """Whether process ``pid`` of this host may still run (anything unsure counts as alive)."""
    if os.name != "posix" or not isinstance(pid, int) or isinstance(pid, bool) or pid <= 0:
        return True  # os.kill(pid, 0) is a probe on POSIX only; elsewhere it would stop the process
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (OSError, OverflowError):  # not ours to signal (so it exists), or a number no pid can be
        return True
    return True


def _stale(holder: dict | None) -> bool:
    """Whether a claim was left by a run of this host that is no longer alive."""
    return holder is not None and holder.get("host") == socket.gethostname() and not _pid_alive(holder.get("pid"))


# --- which folders climodes may write to


def _nearest_existing(path: Path) -> Path:
    return next(p for p in (path, *path.parents) if os.path.lexists(p))


def _limit(folder: Path, name: str, default: int) -> int:
    try:
        return os.pathconf(folder, name)
    except (OSError, ValueError, AttributeError):  # not asked of this file system, or no pathconf here
        return default


def _checked_name(text: str) -> Path:
    """``output.dir`` as a path, or a one-line error if no file system could hold the name."""
    if "\0" in text:
        raise UserError("output.dir: the folder name holds a NUL byte, which no file system allows; fix output.dir")
    try:
        encoded = os.fsencode(text)
    except UnicodeError:
        raise UserError("output.dir: the folder name cannot be written in this system's file-name encoding; "
                        "use plain characters") from None
    path = Path(text)
    existing = _nearest_existing(path)
    name_max, path_max = _limit(existing, "PC_NAME_MAX", 255), _limit(existing, "PC_PATH_MAX", 4096)
    for part in path.parts:
        if len(os.fsencode(part)) > name_max:
            raise UserError(f"output.dir: the name {part[:40]}... is {len(os.fsencode(part))} bytes long, over the "
                            f"file system's limit of {name_max}; choose a shorter output.dir")
    if len(encoded) >= path_max:
        raise UserError(f"output.dir: the path is {len(encoded)} bytes long, over the file system's limit of "
                        f"{path_max}; choose a shorter output.dir")
    return path


def _run_files(spec: RunSpec) -> list[Path]:
    """The config file and every input file the run would read (patterns expanded, missing files skipped)."""
    found = [spec.source]
    for pattern in spec.input.paths:
        literal = os.path.lexists(pattern) or not glob.has_magic(pattern)  # as fields.expand_paths reads it
        found += [Path(p) for p in ([pattern] if literal else sorted(glob.glob(pattern)))]
    return found


def _within(path: Path, folder: Path) -> bool:
    return path == folder or folder in path.parents


def _refuse_protected(final: Path) -> None:
    """Refuse the root of the file system, the home and current folders and their ancestors."""
    real = Path(os.path.realpath(final))
    if real == Path(real.anchor):
        raise UserError(f"output.dir: {final} is the root of the file system; choose a folder for the results")
    for what, where in (("your home folder", Path.home), ("the current folder", Path.cwd)):
        try:
            folder = Path(os.path.realpath(where()))
        except (OSError, RuntimeError):  # no home known, or the current folder was removed
            continue
        if _within(folder, real):
            how = "is" if folder == real else "holds"
            raise UserError(f"output.dir: {final} {how} {what}, which climodes never replaces; choose a new folder "
                            "for the results, e.g. a results folder inside it")


def _refuse_run_files(final: Path, spec: RunSpec) -> None:
    """Refuse a folder that is or holds the config or an input file (by its path as given or resolved)."""
    for path in _run_files(spec):
        if _within(Path(os.path.abspath(path)), Path(os.path.abspath(final))) or \
                _within(Path(os.path.realpath(path)), Path(os.path.realpath(final))):
            what = "the config file" if path == spec.source else "the input file"
            raise UserError(f"output.dir: {final} holds {what} {path}; results never replace the run's own files: "
                            "choose an output.dir apart from them")


PRODUCTS = {"modes.nc": "a run", "projection.nc": "a projection"}
"""The file that tells what a results folder holds, and the command that writes it: a folder of one kind is
never replaced by the other."""


def check_output_dir(spec: RunSpec, product: str = "modes.nc") -> str:
    """Refuse, before any data are read, an ``output.dir`` the results may not be written to.

    A new folder is fine if the folder above it can be made and written in.  An existing one may be
    replaced only with ``output.overwrite``, and only if it is a results folder climodes made: it
    carries the mark (:data:`MARK`), holds nothing its manifest does not list, and holds the same kind
    of results (``product``, see :data:`PRODUCTS`).  Never the root, the home or current folder or an
    ancestor of either, a folder holding the config or an input file, a folder inside a results folder,
    or a symbolic link.

    Returns
    -------
    str
        What a run would do there, for ``climodes check``.
    """
    final = _checked_name(spec.output.dir)
    try:
        return _check_place(final, spec, product)
    except OSError as err:  # a folder on the way that cannot be looked into
        raise UserError(f"output.dir: cannot look at {final} ({err.strerror or err}); choose a folder you can "
                        "read and write") from None


def results_folder_above(path: Path) -> Path | None:
    """The climodes results folder (one carrying :data:`MARK`) that ``path`` lies inside, if any."""
    real = Path(os.path.realpath(path))
    return next((folder for folder in real.parents if _read_json(folder / MARK)), None)


def _refuse_inside_results(final: Path, what: str) -> None:
    """Refuse to write ``what`` inside a results folder: its manifest would no longer list all it holds."""
    if (holder := results_folder_above(final)) is not None:
        raise UserError(f"{what}: {final} lies inside the climodes results folder {holder}, which must hold only "
                        "what its own run wrote; choose a place outside it")


def _check_place(final: Path, spec: RunSpec, product: str) -> str:
    """The checks of :func:`check_output_dir` once the name itself is known to be valid."""
    _refuse_inside_results(final, "output.dir")
    if final.is_symlink():
        raise UserError(f"output.dir: {final} is a symbolic link; climodes writes only to a real folder; "
                        "choose another output.dir")
    if not final.exists():
        ancestor = _nearest_existing(final)
        if not ancestor.is_dir():
            raise UserError(f"output.dir: {final} would lie inside {ancestor}, which is a file; choose another folder")
        if not os.access(ancestor, os.W_OK | os.X_OK):
            raise UserError(f"output.dir: cannot write in {ancestor}; choose a folder you can write to")
        return f"{final} (a new folder)"
    if not final.is_dir():
        raise UserError(f"output.dir: {final} is a file, not a folder; choose another output.dir")
    _refuse_protected(final)
    _refuse_run_files(final, spec)
    return _check_replaceable(final, spec.output.overwrite, product)


def _check_replaceable(final: Path, overwrite: bool, product: str) -> str:
    """Refuse an existing folder that is not a results folder climodes made for ``product``, or ``overwrite``
    is off."""
    mark = read_mark(final)
    if mark is None:
        raise UserError(f"output.dir: {final} exists and is not a climodes results folder (it has no {MARK}); "
                        "climodes replaces only folders it made: choose another output.dir")
    if extra := unlisted(final, mark):
        more = f" and {len(extra) - 1} more" if len(extra) > 1 else ""
        raise UserError(f"output.dir: {final} holds {extra[0]}{more}, which climodes did not write there; "
                        "move it out or choose another output.dir")
    if other := next((name for name in PRODUCTS if name != product and name in mark["files"]), None):
        raise UserError(f"output.dir: {final} holds the {other} of {PRODUCTS[other]}, which {PRODUCTS[product]} "
                        "never replaces; choose another output.dir")
    if not overwrite:
        raise UserError(f"output.dir: {final} exists already; set output.overwrite: true (or --overwrite) to "
                        "replace it, or choose another folder")
    return f"{final} (replaces the results written there on {mark.get('finished', '?')})"


# --- claiming, staging and putting in place


@functools.cache
def _libc_renameat2() -> Callable | None:
    """The C library's ``renameat2`` (Linux, glibc 2.28 or later), or None."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        function = ctypes.CDLL(None, use_errno=True).renameat2
    except (OSError, AttributeError):
        return None
    function.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    return function


def _renameat2(source: Path, target: Path, flag: int) -> bool:
    """Linux ``renameat2`` with ``flag``; False where the C library or the file system does not offer it."""
    function = _libc_renameat2()
    if function is None:
        return False
    if function(_AT_FDCWD, os.fsencode(source), _AT_FDCWD, os.fsencode(target), flag) == 0:
        return True
    code = ctypes.get_errno()
    if code in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP, errno.EOPNOTSUPP):
        return False
    raise OSError(code, os.strerror(code), str(target))


def _move_noreplace(source: Path, target: Path) -> None:
    """Rename ``source`` to ``target``, raising FileExistsError if anything is there: in one atomic step
    where the system allows; elsewhere by an exclusive create of ``target`` first."""
    if _renameat2(source, target, _RENAME_NOREPLACE):
        return
    if os.name != "posix":
        os.rename(source, target)  # Windows: a rename never replaces
    elif source.is_dir():
        os.mkdir(target)  # exclusive; the POSIX rename then replaces only this empty folder, or fails if filled
        try:
            os.rename(source, target)
        except OSError:
            with contextlib.suppress(OSError):
                os.rmdir(target)
            raise
    else:
        try:
            os.link(source, target)  # exclusive for files
        except FileExistsError:
            raise
        except OSError:  # a file system without hard links: the check as close to the rename as it gets
            if os.path.lexists(target):
                raise FileExistsError(errno.EEXIST, os.strerror(errno.EEXIST), str(target)) from None
            os.rename(source, target)
            return
        os.unlink(source)


def _identity(folder: Path) -> tuple | None:
    """What says a results folder is still the same one: its device, inode and the run of its mark."""
    try:
        info = os.lstat(folder)
    except FileNotFoundError:
        return None
    mark = read_mark(folder) if stat.S_ISDIR(info.st_mode) else None
    return info.st_dev, info.st_ino, mark and mark.get("run_id")


def _remove_results(folder: Path) -> list[str]:
    """Remove the files a results folder's manifest lists, the sub-folders they leave empty, then the
    folder; return what stays (names of what climodes did not write)."""
    mark = read_mark(folder)
    if mark is None:
        return sorted(os.listdir(folder))
    for name in mark["files"]:
        with contextlib.suppress(FileNotFoundError):
            if stat.S_ISREG(os.lstat(folder / name).st_mode):
                os.unlink(folder / name)
    parents = {parent for name in mark["files"] for parent in Path(name).parents if parent != Path(".")}
    for parent in sorted(parents, key=lambda p: len(p.parts), reverse=True):
        with contextlib.suppress(OSError):  # not empty: something of someone else's stays in it
            os.rmdir(folder / parent)
    os.unlink(folder / MARK)
    left = sorted(os.listdir(folder))
    if not left:
        os.rmdir(folder)
    return left


def _remove_stale(final: Path) -> list[str]:
    """Remove the staging folders and temporary files beside ``final`` left by killed runs of this host.

    Only names of the pattern climodes gives them, made on this host by a pid no longer alive; a
    staging folder must carry a mark as well, and of a finished one only the listed files go.
    Returns a note for each thing removed.
    """
    pattern = re.compile(rf"\.{re.escape(_short(final.name))}\.climodes-(stage|temporary)-"
                         rf"{_host_tag()}-(\d+)-[0-9a-f]{{8}}(\..*)?")
    with os.scandir(final.parent) as entries:
        found = [(final.parent / e.name, m) for e in entries if (m := pattern.fullmatch(e.name))]
    notes = []
    for path, match in found:
        if _pid_alive(int(match.group(2))):
            continue
        try:
            mode = os.lstat(path).st_mode
            if match.group(1) == "temporary" and stat.S_ISREG(mode):
                os.unlink(path)
            elif match.group(1) == "stage" and stat.S_ISDIR(mode) and _read_json(path / MARK):
                if read_mark(path) is None:  # still being written when its run was killed
                    shutil.rmtree(path)
                elif left := _remove_results(path):  # old results moved aside by a replace cut short
                    notes.append(f"kept {path}, left by a run (pid {match.group(2)}) that was killed: it holds "
                                 f"{', '.join(left)}, which climodes did not write")
                    continue
            else:
                continue
        except OSError:  # best effort: a leftover that cannot go now is tried again next time
            continue
        notes.append(f"removed {path}, left by a run (pid {match.group(2)}) that was killed")
    return notes


def _claim(final: Path, me: dict) -> Path:
    """Claim ``final`` for this run by an exclusive create of its claim file (a stale one is broken)."""
    claim = _claim_path(final)
    for _ in range(3):
        try:
            fd = os.open(claim, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)
        except FileExistsError:
            holder = _read_json(claim)
            if not _stale(holder):
                who = (f"pid {holder.get('pid')} on {holder.get('host')}, started {holder.get('started')}"
                       if holder else "its claim file cannot be read yet")
                raise UserError(f"output.dir: {final} is being written by another climodes run ({who}); wait for "
                                f"it or choose another output.dir (if no such run is going, remove {claim})") from None
            _break_claim(claim, holder)
            continue
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as f:
                json.dump(me, f)
        except BaseException:
            os.unlink(claim)
            raise
        return claim
    raise UserError(f"output.dir: {final} is claimed by other runs as soon as it is freed; try again")


def _break_claim(claim: Path, holder: dict) -> None:
    """Remove the stale claim ``holder`` read from ``claim`` and nothing else: it is renamed aside first
    (one atomic step), and put back if it turns out to be a newer run's claim."""
    aside = claim.with_name(f"{claim.name}-stale-{secrets.token_hex(4)}")
    try:
        os.rename(claim, aside)
    except FileNotFoundError:
        return  # another run broke it first
    if _read_json(aside) != holder:
        with contextlib.suppress(OSError):
            os.link(aside, claim)  # a live claim taken by mistake: back in place, unless a newer one is there
    os.unlink(aside)


def _make_parents(final: Path) -> list[Path]:
    """Make the folders above ``final`` that are missing; return the ones this run made."""
    made = []
    for folder in reversed(final.parents):
        if os.path.isdir(folder):
            continue
        try:
            os.mkdir(folder)
        except FileExistsError:  # made meanwhile by someone else
            continue
        made.append(folder)
    return made


def _write_mark(folder: Path, me: dict, files: list[str] | None) -> None:
    """Write the manifest of ``folder``: the ``files`` it holds, or None while it is being written."""
    body = {**me, "files": files, **({"finished": _now()} if files is not None and "finished" not in me else {})}
    write_file_atomically(folder / MARK, lambda path: path.write_text(json.dumps(body, indent=1), encoding="utf-8"),
                          replace=True)


def _changed(final: Path) -> UserError:
    return UserError(f"output.dir: {final} appeared or changed while the run computed (not by this run); it was "
                     "left untouched and no results were written; move it away or choose another output.dir")


def _put_in_place(stage: Path, final: Path, before: tuple | None) -> list[str]:
    """Move the finished ``stage`` to ``final``, replacing nothing but the results folder seen at the start.

    ``before`` is :func:`_identity` of ``final`` once the run had claimed it (None: there was none).
    Returns notes on anything that had to stay.
    """
    now = _identity(final)
    if now is None:
        try:
            _move_noreplace(stage, final)
        except FileExistsError:
            raise _changed(final) from None
        return []
    mark = read_mark(final)
    if now != before or mark is None or unlisted(final, mark):
        raise _changed(final)
    if _renameat2(stage, final, _RENAME_EXCHANGE):
        old = stage
        if _identity(old) != before:  # swapped for something else at the last instant: swap back
            _renameat2(stage, final, _RENAME_EXCHANGE)
            raise _changed(final)
    else:  # no atomic exchange here: move the old results aside, check them, then move the new ones in
        old = final.parent / _hidden_name(final, "stage")
        os.rename(final, old)
        if _identity(old) != before:
            _move_noreplace(old, final)
            raise _changed(final)
        try:
            _move_noreplace(stage, final)
        except OSError:  # something took the name meanwhile: the old results go back if they can
            with contextlib.suppress(OSError):
                _move_noreplace(old, final)
            raise _changed(final) from None
    left = _remove_results(old)
    return [f"the replaced results folder held {', '.join(left)}, which climodes did not write; left in {old}"] \
        if left else []


@contextlib.contextmanager
def results_folder(spec: RunSpec, say: Callable[[str], None] = lambda line: None,
                   product: str = "modes.nc") -> Iterator[Path]:
    """Claim ``spec.output.dir``, yield a staging folder to write the results into, then put them in place.

    The claim is an exclusive create of a claim file beside the folder, so of two runs started
    together one wins and the other is refused; leftovers of killed runs of this host are removed
    once the claim is held.  When the block ends well, the staging folder gets its mark
    (:data:`MARK`, listing every file in it) and is renamed to ``output.dir``, replacing only the
    results folder checked at the start (one holding the same ``product``, see :data:`PRODUCTS`).  On any
    failure or interruption the staging folder, the claim and the folders made above are removed.  Notes
    go to ``say``.
    """
    check_output_dir(spec, product)
    final = Path(spec.output.dir)
    me = _run_identity(spec.source)
    made: list[Path] = []
    claim = stage = None
    done = False
    try:
        with _writing(final):
            made = _make_parents(final)
            claim = _claim(final, me)
            for line in _remove_stale(final):
                say(f"note: {line}")
            check_output_dir(spec, product)  # again, now that no other run can change it
            before = _identity(final)
            stage = final.parent / _hidden_name(final, "stage")
            os.mkdir(stage)  # with the user's umask
            _write_mark(stage, me, None)
        yield stage
        with _writing(final), _signals_held(act=False):
            _write_mark(stage, me, listing(stage))
            if _read_json(claim) != me:
                raise UserError(f"output.dir: another run took over the claim on {final}; no results were written")
            notes = _put_in_place(stage, final, before)
            done = True
        for line in notes:
            say(f"note: {line}")
    finally:
        with _signals_held(act=True), contextlib.suppress(OSError):
            if stage is not None and not done:
                shutil.rmtree(stage, ignore_errors=True)
            if claim is not None and _read_json(claim) == me:
                os.unlink(claim)
            for folder in [] if done else reversed(made):
                with contextlib.suppress(OSError):
                    os.rmdir(folder)


@contextlib.contextmanager
def results_update(folder: Path) -> Iterator[list[Path]]:
    """Change a finished results folder in place (its figures drawn again), keeping its manifest true.

    The folder must carry its mark and hold nothing climodes did not write; it is claimed as a run
    claims it, so no run replaces it meanwhile.  The block adds the files it writes (each atomically)
    to the list it is given; when it ends, the manifest lists those and the files listed before that
    are still there, never a file someone else put in the folder meanwhile.
    """
    folder = Path(folder)
    mark = read_mark(folder)
    if mark is None:
        raise UserError(f"{folder}: not a climodes results folder (it has no {MARK}); give a folder written by "
                        "climodes run")
    if foreign := unlisted(folder, mark):
        raise UserError(f"{folder}: holds {foreign[0]}, which climodes did not write; move it away and try again")
    me = _run_identity(Path(mark.get("config", "")))
    claim = _claim(folder, me)
    try:
        written: list[Path] = []
        yield written
        ours = set(mark["files"]) | {Path(path).relative_to(folder).as_posix() for path in written}
        _write_mark(folder, {**mark, "updated": _now()}, [name for name in listing(folder) if name in ours])
    finally:
        with _signals_held(act=True), contextlib.suppress(OSError):
            if _read_json(claim) == me:
                os.unlink(claim)


@contextlib.contextmanager
def _writing(final: Path) -> Iterator[None]:
    """Report a failure of the file system while the results are claimed or put in place as one line."""
    try:
        yield
    except OSError as err:
        reason = err.strerror or str(err)
        raise UserError(f"output.dir: cannot write the results to {final} ({reason}); nothing was written; "
                        "check the folder, free some space or choose another output.dir") from None


@contextlib.contextmanager
def _signals_held(act: bool) -> Iterator[None]:
    """Hold SIGINT and SIGTERM while results are put in place or tidied away, so that neither is cut in
    half.  A signal that arrived meanwhile is raised again at the end when ``act``, else dropped (the
    results were complete before it could stop them)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught: list[int] = []
    previous = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    for s in previous:
        signal.signal(s, lambda signum, frame: caught.append(signum))
    try:
        yield
    finally:
        for s, handler in previous.items():
            signal.signal(s, signal.SIG_DFL if handler is None else handler)
        if caught and act:
            signal.raise_signal(caught[0])


def write_file_atomically(path: Path, write: Callable[[Path], None], replace: bool = False) -> None:
    """Write one file complete or not at all: ``write`` fills a temporary file beside ``path`` (same
    suffix, hidden), which is then renamed into place.

    For outputs written outside a results folder.  An existing file is replaced only with
    ``replace``; a folder never.  Temporary files beside ``path`` left by killed runs of this host
    are removed first.

    Raises
    ------
    UserError
        If ``path`` is a folder, or exists (or appears meanwhile) and ``replace`` is false.
    """
    path = Path(path)
    if path.is_dir():
        raise UserError(f"{path} is a folder; give a file name")
    if not replace and os.path.lexists(path):
        raise UserError(f"{path} exists already; choose another name or ask to replace it")
    _remove_stale(path)
    temporary = path.parent / _hidden_name(path, "temporary", path.suffix)
    try:
        write(temporary)
        if replace:
            os.replace(temporary, path)  # onto a folder this raises: a folder is never replaced
        else:
            _move_noreplace(temporary, path)
    except FileExistsError:
        raise UserError(f"{path} appeared while it was being written; it was left untouched; choose another "
                        "name") from None
    except IsADirectoryError:
        raise UserError(f"{path} became a folder while it was being written; it was left untouched") from None
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(temporary)


# --- single files written outside a results folder (reconstructions, tables)


_SIGNED = re.compile(r"climodes \d+\.\d+\S*")  # "climodes 0.1.0": what climodes signs its files with


def written_by_climodes(path: Path) -> bool:
    """Whether the file ``path`` says climodes wrote it: a NetCDF file's ``source`` attribute, the first line
    of a CSV table (``# climodes VERSION: ...``), the ``source`` of a Parquet file's metadata (see
    :func:`table_writer`), each naming climodes and its version."""
    try:
        if path.suffix == ".csv":
            with open(path, encoding="utf-8") as f:
                first = f.readline(1000)
            return first.startswith("# ") and bool(_SIGNED.fullmatch(first[2:].split(":", 1)[0]))
        if path.suffix == ".parquet":
            import pyarrow.parquet

            metadata = pyarrow.parquet.read_schema(path).metadata or {}
            return bool(_SIGNED.fullmatch(metadata.get(b"source", b"").decode(errors="replace")))
        import netCDF4

        with netCDF4.Dataset(path) as nc:
            return bool(_SIGNED.fullmatch(str(getattr(nc, "source", ""))))
    except Exception:  # unreadable, not of its kind: not a file climodes wrote
        return False


def check_output_file(path: Path, overwrite: bool, option: str = "-o") -> None:
    """Refuse, before any work, a file name an output may not be written to.

    The folder it goes in must exist and lie outside every results folder; an existing file is replaced
    only with ``overwrite`` and only if climodes wrote it (:func:`written_by_climodes`); never a folder or
    a symbolic link.
    """
    if path.is_symlink():
        raise UserError(f"{option} {path}: is a symbolic link; climodes writes only to a real file: give another name")
    if path.is_dir():
        raise UserError(f"{option} {path}: is a folder; give a file name")
    if not path.parent.is_dir():
        raise UserError(f"{option} {path}: the folder {path.parent} does not exist; make it first or give another "
                        "name")
    _refuse_inside_results(path, option)
    if not path.exists():
        return
    if not overwrite:
        raise UserError(f"{option} {path}: exists already; give --overwrite to replace it (only a file climodes "
                        "wrote is replaced)")
    if not written_by_climodes(path):
        raise UserError(f"{option} {path}: exists and was not written by climodes; climodes replaces only files it "
                        "wrote: give another name")


def table_writer(frame, comment: str, metadata: dict[str, str], suffix: str) -> Callable[[Path], None]:
    """What writes a ``pandas.DataFrame`` to a file of ``suffix``: CSV with ``comment`` as its first line
    (``# climodes ...``, which pandas skips with ``comment="#"``), or Parquet with ``metadata`` (``source``
    among them) in its schema."""

    def csv(path: Path) -> None:
        with open(path, "w", encoding="utf-8", newline="") as f:
            f.write(f"# {comment}\n")
            frame.to_csv(f, index=False, lineterminator="\n")

    def parquet(path: Path) -> None:
        import pyarrow
        import pyarrow.parquet

        table = pyarrow.Table.from_pandas(frame, preserve_index=False)
        given = {key.encode(): value.encode() for key, value in metadata.items()}
        pyarrow.parquet.write_table(table.replace_schema_metadata({**(table.schema.metadata or {}), **given}), path)

    return csv if suffix == ".csv" else parquet
