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


def mode_table(ds: xr.Dataset) -> list[str]:
    """The table of the modes, as ``climodes run`` prints it and ``run.log`` and ``climodes show`` hold it.

    One row per mode: variance explained with its North et al. (1982) error, the mode's own effective sample
    size, North's rule, and, when the red-noise test ran, the noise eigenvalue (as a share of the total
    variance) and the verdict.  Columns a file does not hold are left out.
    """
    tested = "significant" in ds
    header = "mode  variance explained"
    if "effective_sample_size" in ds:
        header += "  effective N"
    header += "  separated (North)"
    if tested:
        level = ds["noise_eigenvalue"].attrs.get("level", float("nan"))
        header += f"  red noise {100 * level:g}%  significant"
    lines = [header]
    total = ds["eigenvalue"].attrs.get("total_variance", np.nan)
    for k, mode in enumerate(ds["mode"].values):
        line = (f"{mode:>4}  {100 * float(ds['variance_explained'][k]):8.1f}% +/- "
                f"{100 * float(ds['variance_explained_error'][k]):4.1f}%")
        if "effective_sample_size" in ds:
            line += f"  {float(ds['effective_sample_size'][k]):11.0f}"
        if "separated" in ds:
            line += f"  {'yes' if ds['separated'][k] else 'no, mixed':<17}"
        if tested:
            noise = 100 * float(ds["noise_eigenvalue"][k]) / total
            line += f"  {noise:12.1f}%  {'yes' if ds['significant'][k] else 'no'}"
        lines.append(line.rstrip())
    steps = ds["pc"].shape[1]
    if "effective_sample_size" in ds:
        lines.append(f"effective N: each mode's own effective sample size, of {steps} time steps")
    if tested:
        lines.append(f"red noise {100 * level:g}%: that level of the eigenvalues at the same rank of "
                     f"{int(ds['noise_eigenvalue'].attrs.get('surrogates', 0))} red-noise fields")
        lines.append("significant: above it, counted from mode 1 up to the first mode that is not")
    return lines


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
        *(f"  {line}" for line in mode_table(ds)),
    ]
    notes = attrs.get("climodes_notes", "none")
    for i, line in enumerate(notes.splitlines() or ["none"]):
        lines.append(f"  {'notes' if i == 0 else '':<11} {line}")
    files = attrs.get("climodes_input_files", "").splitlines()
    lines.append(f"  inputs      {len(files)} file(s)" + (f", first {files[0]}" if files else ""))
    lines.append(f"  config      sha256 {attrs.get('climodes_config_sha256', '?')[:16]}...")
    lines.append(f"  rerun       {attrs.get('history', '?').split(': ', 1)[-1]}")
    return "\n".join(lines)
