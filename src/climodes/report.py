"""``climodes show``: a one-screen summary of a results file, so nobody needs a NetCDF dump."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from climodes.grid import map_coordinates
from climodes.results import open_results


def _range(values: np.ndarray) -> str:
    if values.ndim == 1:
        return f"{values[0]:g} to {values[-1]:g}"
    return f"{np.nanmin(values):g} to {np.nanmax(values):g} (2-D)"


def summary(path: str | Path) -> str:
    """The summary text of a results folder or ``modes.nc``."""
    ds = open_results(path)
    _, rows, columns = ds["eof"].dims
    lat, lon = map_coordinates(ds)
    time = ds["pc"].dims[1]
    attrs = ds.attrs
    units = ds["eof"].attrs.get("units", "?")
    times = ds[time].values
    lines = [
        f"{Path(path)}",
        f"  made by     {attrs.get('source', '?')} on {attrs.get('date_created', '?')}",
        f"  field       {ds['eof'].attrs.get('long_name', 'eof').removeprefix('EOF map of ').split(':')[0]} "
        f"[{units}]",
        f"  domain      lat {_range(ds[lat].values)} ({ds.sizes[rows]} rows), "
        f"lon {_range(ds[lon].values)} ({ds.sizes[columns]} columns)",
        f"  points      {attrs.get('climodes_points', '?')}",
        f"  period      {str(times[0])[:10]} to {str(times[-1])[:10]}, {times.size} steps",
        f"  method      {attrs.get('climodes_method', '?')}",
        f"  sample size {attrs.get('climodes_effective_sample_size', float('nan')):.0f} effective "
        f"(North et al. 1982 errors)",
        "  mode  variance explained  separated",
    ]
    separated = ds["separated"].values if "separated" in ds else np.ones(ds.sizes["mode"])
    for k, mode in enumerate(ds["mode"].values):
        lines.append(f"  {mode:>4}  {100 * float(ds['variance_explained'][k]):8.1f}% +/- "
                     f"{100 * float(ds['variance_explained_error'][k]):4.1f}%   {'yes' if separated[k] else 'no'}")
    notes = attrs.get("climodes_notes", "none")
    for i, line in enumerate(notes.splitlines() or ["none"]):
        lines.append(f"  {'notes' if i == 0 else '':<11} {line}")
    files = attrs.get("climodes_input_files", "").splitlines()
    lines.append(f"  inputs      {len(files)} file(s)" + (f", first {files[0]}" if files else ""))
    lines.append(f"  config      sha256 {attrs.get('climodes_config_sha256', '?')[:16]}...")
    lines.append(f"  rerun       {attrs.get('history', '?').split(': ', 1)[-1]}")
    return "\n".join(lines)
