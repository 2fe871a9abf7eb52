"""Write the results: a CF-1.10 ``modes.nc`` with its provenance, atomically.

A results folder appears complete or not at all: everything is written into a
hidden folder beside it and renamed into place at the end; on any failure the
hidden folder is removed.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import hashlib
import os
import shlex
import shutil
import sys
import tempfile
from pathlib import Path
from typing import Iterator

import numpy as np
import xarray as xr

from climodes import __version__
from climodes.config import OutputSection, RunSpec
from climodes.errors import UserError
from climodes.fields import OpenedField
from climodes.grid import GRID_LAT, GRID_LON

FILL = 9.969209968386869e36  # the netCDF default fill for doubles


def check_output_dir(spec: OutputSection) -> None:
    """Fail early, before any data are read, if the results could not be written."""
    final = Path(spec.dir)
    if final.exists() and not final.is_dir():
        raise UserError(f"output.dir: {final} is a file, not a folder; choose another output.dir")
    if final.exists() and not spec.overwrite:
        raise UserError(f"output.dir: {final} exists already; set output.overwrite: true or choose another folder")
    ancestor = final.parent
    while not ancestor.exists():
        ancestor = ancestor.parent
    if not ancestor.is_dir():
        raise UserError(f"output.dir: {final} would lie inside {ancestor}, which is a file; choose another folder")
    if not os.access(ancestor, os.W_OK | os.X_OK):
        raise UserError(f"output.dir: cannot write in {ancestor}; choose a folder you can write to")


@contextlib.contextmanager
def staged_dir(final: Path) -> Iterator[Path]:
    """Yield a hidden folder to write into; rename it to ``final`` when the block succeeds."""
    created = [p for p in reversed(final.parents) if not p.exists()]
    final.parent.mkdir(parents=True, exist_ok=True)
    stage = Path(tempfile.mkdtemp(prefix=f".{final.name}.partial-", dir=final.parent))
    try:
        yield stage
        if final.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{final.name}.old-", dir=final.parent))
            os.replace(final, old / final.name)
            os.replace(stage, final)
            shutil.rmtree(old)
        else:
            os.replace(stage, final)
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        for folder in reversed(created):
            with contextlib.suppress(OSError):
                folder.rmdir()
        raise


def _squared_units(units: str | None) -> dict:
    return {"units": f"({units})^2"} if units else {}


def results_dataset(modes: xr.Dataset, opened: OpenedField, spec: RunSpec, extra: dict) -> xr.Dataset:
    """Dress the solver's modes as the CF results of the contract.

    ``extra`` carries ``errors``, ``separated``, ``method``, ``notes`` and
    ``units``.  Every other map on ``(mode, lat, lon)`` gets the grid mapping too.
    """
    units = extra["units"]
    field_name = spec.input.variable
    long_name = opened.data.attrs.get("long_name", field_name)
    ds = modes.copy()
    curvilinear = GRID_LAT in ds.coords
    ds["mode"].attrs = {"long_name": "mode number, in order of decreasing variance", "units": "1"}
    lat, lon = (GRID_LAT, GRID_LON) if curvilinear else ("lat", "lon")
    ds[lat].attrs = {**opened.data[lat].attrs, "standard_name": "latitude", "units": "degrees_north"}
    ds[lon].attrs = {**opened.data[lon].attrs, "standard_name": "longitude", "units": "degrees_east"}
    if not curvilinear:
        ds["lat"].attrs["axis"], ds["lon"].attrs["axis"] = "Y", "X"
    ds["time"].attrs = {k: v for k, v in opened.data["time"].attrs.items() if k not in ("units", "calendar", "bounds")}
    ds["time"].attrs.update(standard_name="time", axis="T")
    ds["eof"].attrs = {
        "long_name": f"EOF map of {long_name}: regression of the anomaly on the standardised PC",
        **({"units": units} if units else {}),
        **({} if curvilinear else {"grid_mapping": "crs"}),
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
    if not curvilinear:  # a curvilinear grid has no geotransform: viewers place it by its 2-D coordinates
        import pyproj

        for name in ds.data_vars:
            if ds[name].dims == ("mode", "lat", "lon"):
                ds[name].attrs["grid_mapping"] = "crs"
        ds["crs"] = xr.DataArray(np.int32(0), attrs=pyproj.CRS("EPSG:4326").to_cf())
    ds = ds.rename({k: v for k, v in opened.names.items() if k != v})
    if curvilinear:
        ds = ds.rename({GRID_LAT: opened.grid[0], GRID_LON: opened.grid[1]})
    ds.attrs = provenance(spec, opened, extra)
    return ds


def provenance(spec: RunSpec, opened: OpenedField, extra: dict) -> dict:
    """Global attributes that say where the results came from and how to make them again."""
    config_text = spec.to_yaml()
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
        "history": f"{now}: climodes run {shlex.quote(str(spec.source))}",
        "references": "North et al. 1982, Mon. Wea. Rev. 110, 699-706 (sampling errors); Bretherton et al. 1999, "
                      "J. Climate 12, 1990-2009 (effective sample sizes)",
        "date_created": now,
        "climodes_method": extra["method"],
        "climodes_config": config_text,
        "climodes_config_sha256": hashlib.sha256(config_text.encode()).hexdigest(),
        "climodes_input_files": files,
        "climodes_points": extra["points"],
        "climodes_notes": "\n".join(extra["notes"]) or "none",
        "climodes_python": sys.version.split()[0],
    }


def write_netcdf(ds: xr.Dataset, path: Path, time_encoding: dict) -> None:
    """Write ``ds`` as NetCDF-4 with CF-friendly encodings (no fill values on coordinates)."""
    encoding = {name: {"_FillValue": None} for name in ds.coords}
    for name, var in ds.data_vars.items():
        encoding[name] = {"_FillValue": FILL if var.dtype.kind == "f" else None}
        if var.ndim >= 2:
            encoding[name].update(zlib=True, complevel=4)
    time_name = next(d for d in ds["pc"].dims if d != "mode")
    encoding[time_name].update(time_encoding)
    ds.to_netcdf(path, format="NETCDF4", encoding=encoding)


def _regular(values: np.ndarray) -> bool:
    steps = np.diff(values)
    return values.size < 2 or bool(np.allclose(steps, steps[0], rtol=1e-5, atol=1e-8))


def check_geotiff_grid(field: xr.DataArray) -> None:
    """A GeoTIFF holds a regular grid only; say so before any work is done."""
    if GRID_LAT in field.coords:
        raise UserError("output.formats: geotiff needs a regular latitude-longitude grid, and this one is "
                        "curvilinear (2-D latitudes); drop geotiff (modes.nc carries the 2-D coordinates)")
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
    """Write the EOF maps as one north-up, DEFLATE-compressed GeoTIFF band per mode (EPSG:4326, NaN nodata)."""
    import rasterio
    import rioxarray  # noqa: F401  (registers the .rio accessor)

    eof = geotiff_layout(ds["eof"])
    _, lat, lon = eof.dims
    bands = xr.DataArray(eof.values.astype(np.float32), dims=("band", "y", "x"),
                         coords={"band": ds["mode"].values, "y": eof[lat].values, "x": eof[lon].values})
    bands = bands.rio.write_crs("EPSG:4326").rio.write_nodata(np.nan)
    units = ds["eof"].attrs.get("units", "")
    tags = {name: str(value) for name, value in ds.attrs.items() if name != "Conventions"}
    bands.rio.to_raster(path, driver="GTiff", compress="DEFLATE", tags={**tags, "units": units})
    with rasterio.open(path, "r+") as raster:
        for k in range(ds.sizes["mode"]):
            share = 100 * float(ds["variance_explained"][k])
            raster.set_band_description(k + 1, f"mode {k + 1} EOF ({units}), {share:.1f}% of variance")
