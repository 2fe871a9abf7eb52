"""Read a results file (``modes.nc``) back, checking that it is one: for show, figures and reuse.

Everything that works from a finished run (``climodes show``, redrawn figures,
projection, reconstruction) opens it here, so a folder that is not a results
folder, a foreign NetCDF file or a damaged one is refused with one line, the
same way everywhere.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import xarray as xr

from climodes.errors import UserError

RESULTS_FILE = "modes.nc"
PROJECTION_FILE = "projection.nc"  # what climodes project writes into its own results folder
_SHAPES = {"eof": 3, "pc": 2, "eigenvalue": 1, "variance_explained": 1, "variance_explained_error": 1}


def results_path(path: str | Path) -> Path:
    """The ``modes.nc`` of a results folder, or ``path`` itself when it names a file."""
    if not isinstance(path, (str, os.PathLike)):
        raise UserError(f"expected climodes results: a results folder, its {RESULTS_FILE} or the Dataset of a run; "
                        f"got {type(path).__name__}")
    path = Path(path)
    return path / RESULTS_FILE if path.is_dir() else path


def open_results(path: str | Path) -> xr.Dataset:
    """Open a results folder or its ``modes.nc`` (lazily) and check that climodes wrote it.

    Raises
    ------
    UserError
        If the file is missing, empty, not NetCDF, or not a climodes results file.
    """
    target = results_path(path)
    if not target.exists():
        if (target.parent / PROJECTION_FILE).exists():
            raise UserError(f"{target.parent}: holds a projection ({PROJECTION_FILE}), not the modes of a run; give "
                            f"the results folder of the run it was projected onto")
        raise UserError(f"{target}: no such results file; give a results folder or its {RESULTS_FILE}")
    if target.stat().st_size == 0:
        raise UserError(f"{target}: the file is empty; run climodes again to write it")
    try:
        # the engine named: guessing it imports every installed backend (0.2 s of rasterio's alone)
        ds = xr.open_dataset(target, engine="netcdf4", decode_timedelta=False)
    except Exception as err:  # any error of the reader: the file is not readable NetCDF
        reason = str(err).splitlines()[0] if str(err) else type(err).__name__
        if "Unknown file format" in reason:  # the library's words, with its error number and the path again
            reason = "not a NetCDF file"
        raise UserError(f"{target}: cannot be read as NetCDF ({reason}); give a results folder written by "
                        "climodes run or its modes.nc") from None
    try:
        check_results(ds, target)
    except UserError:
        ds.close()
        raise
    return ds


def check_results(ds: xr.Dataset, where: str | Path) -> None:
    """Refuse ``ds`` (named ``where`` in messages) unless it holds the variables of a climodes results file.

    Raises
    ------
    UserError
        If a variable is missing, has other dimensions, or another program made the file.
    """
    if not isinstance(ds, xr.Dataset):
        raise UserError(f"expected climodes results: a results folder, its {RESULTS_FILE} or the Dataset of a run; "
                        f"got {type(ds).__name__}")
    missing = [name for name in _SHAPES if name not in ds]
    if missing or not str(ds.attrs.get("source", "")).startswith("climodes"):
        what = f"no {', '.join(missing)}" if missing else f"made by {ds.attrs.get('source', 'another program')!r}"
        raise UserError(f"{where}: not a climodes results file ({what}); give a folder written by climodes run")
    for name, ndim in _SHAPES.items():
        if ds[name].ndim != ndim or ds[name].dims[0] != "mode":
            raise UserError(f"{where}: {name} has dimensions {ds[name].dims}, not mode first and {ndim} in all; "
                            "the file was changed after climodes wrote it; run climodes again")
    if damage := _damage(ds):
        raise UserError(f"{where}: {damage}; the file was changed after climodes wrote it; run climodes again")


def _damage(ds: xr.Dataset) -> str | None:
    """What in a results file of the right shape cannot be what climodes wrote, if anything: mode numbers
    other than 1..K, a PC time axis without dates, missing, infinite or non-positive eigenvalues, missing or
    infinite shares or PC values, a map without a single value.  Reads the small variables and one map at a
    time."""
    mode = ds["mode"].values
    if mode.size == 0 or mode.dtype.kind not in "iu" or not np.array_equal(mode, np.arange(1, mode.size + 1)):
        return f"its mode numbers are {_few(mode)}, not 1 to {mode.size}"
    time = ds["pc"].dims[1]
    if time not in ds.coords or not (ds[time].dtype.kind == "M" or hasattr(ds[time].values.flat[0], "calendar")):
        return f"the time axis {time} of pc holds no dates"
    for name in ("eigenvalue", "variance_explained", "variance_explained_error", "pc"):
        if not np.isfinite(ds[name].values).all():
            return f"{name} holds missing or infinite values"
    if (ds["eigenvalue"].values <= 0).any():
        return f"eigenvalue holds values that are not positive ({_few(ds['eigenvalue'].values)})"
    for k in range(mode.size):
        if not ds["eof"].isel(mode=k).notnull().any():
            return f"the eof map of mode {mode[k]} holds no value"
    return None


def _few(values: np.ndarray) -> str:
    """The first few of ``values``, for a message."""
    shown = [f"{v:.6g}" if isinstance(v, (float, np.floating)) else str(v) for v in values[:4]]
    return ", ".join(shown) + (" ..." if values.size > 4 else "")
