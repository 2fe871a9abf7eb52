"""Read a results file (``modes.nc``) back, checking that it is one: for show, figures and reuse.

Everything that works from a finished run (``climodes show``, redrawn figures,
projection, reconstruction) opens it here, so a folder that is not a results
folder, a foreign NetCDF file or a damaged one is refused with one line, the
same way everywhere.
"""

from __future__ import annotations

from pathlib import Path

import xarray as xr

from climodes.errors import UserError

RESULTS_FILE = "modes.nc"
_SHAPES = {"eof": 3, "pc": 2, "eigenvalue": 1, "variance_explained": 1, "variance_explained_error": 1}


def results_path(path: str | Path) -> Path:
    """The ``modes.nc`` of a results folder, or ``path`` itself when it names a file."""
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
        raise UserError(f"{target}: no such results file; give a results folder or its {RESULTS_FILE}")
    if target.stat().st_size == 0:
        raise UserError(f"{target}: the file is empty; run climodes again to write it")
    try:
        ds = xr.open_dataset(target, decode_timedelta=False)
    except Exception as err:  # any backend's error: the file is not readable NetCDF
        reason = str(err).splitlines()[0] if str(err) else type(err).__name__
        raise UserError(f"{target}: cannot be read as NetCDF ({reason})") from None
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
