"""What an analyst does next with the modes of a finished run: rebuild the field, tabulate the
coefficients, project another field onto the same patterns.

Everything here starts from a results file (``modes.nc``, opened by
:func:`climodes.results.open_results`) and the preparation it keeps
(:func:`climodes.prepare.fitted_preparation`), never from the training's
input files.  The conventions are those of :mod:`climodes.solvers`: with
``X = A W = U S V^T`` (``A`` the anomalies, ``W`` the square-root area
weights), ``pc_k = sqrt(n - 1) U_k``, ``lambda_k = s_k^2 / (n - 1)`` and
``eof_k = A^T pc_k / (n - 1)``.

- **Reconstruction**: ``sum_k pc_k(t) eof_k(x)`` over the chosen modes, the
  anomalies, or the field's values with the fitted climatology and trend added
  back (:func:`climodes.prepare.unapply`), built lazily in blocks of time
  steps so that it is written block by block.
- **Coefficient table**: one row per time step with its calendar, the PCs,
  the fraction left unexplained after each mode and the step's variance.
- **Projection**: another field's anomalies ``a(t, x)``, prepared with the
  training's fitted preparation (:func:`climodes.prepare.apply`, the run's own
  code path), give pseudo-PCs

      p_k(t) = sum_x a(t, x) w(x)^2 eof_k(x) / lambda_k.

  For the training field this is its own PC: ``sum_x A w^2 eof_k = X X^T pc_k
  / (n - 1) = lambda_k pc_k``, as ``pc_k`` is an eigenvector of ``X X^T`` with
  eigenvalue ``(n - 1) lambda_k``.  The field is read once, each chunk of
  the files decompressed once where the budget allows: blocks of whole maps
  along time, or slabs of compressed tiles along time worked on a few steps
  at a time; else blocks of latitude rows as the streaming solvers read it
  (:mod:`climodes.blocks`), whose small products are summed pairwise
  (:func:`plan_projection`).
"""

from __future__ import annotations

import datetime as dt
import re
import secrets
import shlex
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, ContextManager

import dask
import dask.array
import numpy as np
import pandas as pd
import xarray as xr

from climodes import __version__
from climodes.blocks import field_blocks, flat, quietly, row_slices, step_squares, time_blocks, tree_sum
from climodes.cluster import resident_bytes
from climodes.config import size_text
from climodes.diagnostics import unexplained_fractions
from climodes.errors import UserError
from climodes.fields import units_key
from climodes.grid import grid_coordinates, map_coordinates
from climodes.prepare import (
    Fitted,
    TimeKeys,
    apply,
    fitted_preparation,
    fitted_units,
    key_rule,
    keys_of,
    season_years,
    unapply,
)
from climodes.report import long_name_of, modes_text, months_text, stored_config
from climodes.solvers import block_size
from climodes.storage import READ_CACHE, SLAB_BYTES_PER_VALUE, Storage, cache_held

# bytes a value of a block costs: the modes' product and the preparation put back in float64, the float32 copies
# written (measured on a 0.5 GB field: 25; with room to spare)
REBUILD_BYTES_PER_VALUE = 64
PROJECT_BYTES_PER_VALUE = 40  # the block as read, in float64, and the preparation's working copies (measured alike)


def time_name(results: xr.Dataset) -> str:
    """The name of the time axis of a results file (the input's own)."""
    return results["pc"].dims[1]


# --- the modes chosen on the command line


def chosen_modes(text: str, available: np.ndarray) -> list[int]:
    """The mode numbers ``text`` names (``1-3``, ``1,4``, ``1-3,5``), each of them held by the results.

    >>> chosen_modes("1-3,5", np.arange(1, 6))
    [1, 2, 3, 5]
    """
    first_mode, last_mode = int(available[0]), int(available[-1])
    numbers: list[int] = []
    for part in text.split(","):
        match = re.fullmatch(r"\s*(\d+)\s*(?:-\s*(\d+)\s*)?", part)
        if not match:
            raise UserError(f"--modes {text}: give mode numbers such as 1-3 or 1,4")
        first, last = int(match.group(1)), int(match.group(2) or match.group(1))
        if last < first:
            raise UserError(f"--modes {text}: the range {part.strip()} runs backwards; write {last}-{first}")
        if first < first_mode or last > last_mode:
            raise UserError(f"--modes {text}: the results hold modes {first_mode} to {last_mode}; choose among them")
        numbers += [n for n in range(first, last + 1) if n not in numbers]
    return numbers


# --- reconstruction


def reconstruction(results: xr.Dataset, which: list[int], anomalies: bool, budget: int,
                   in_use: int | None = None) -> xr.DataArray:
    """The field rebuilt from the modes ``which``, as a lazy ``(time, lat, lon)`` float32 array.

    Each block of time steps is ``sum_k pc_k(t) eof_k(x)`` over the chosen
    modes; unless ``anomalies``, the fitted preparation is put back
    (:func:`climodes.prepare.unapply`: the offset, the scale, the trend and the
    climatology of each step's calendar key), giving values in the input's
    units.  NaN where a point was not used.  A block holds as many steps as
    fit ``budget`` bytes beside what the process holds once the maps and the
    fitted preparation are read (``in_use``, measured then when not given),
    so writing the array chunk by chunk never holds the whole field.
    """
    maps = np.asarray(results["eof"].sel(mode=which).values, dtype=np.float64)
    pcs = np.asarray(results["pc"].sel(mode=which).values, dtype=np.float64).T  # (time, mode)
    fitted = None if anomalies else fitted_preparation(results)
    keys = None if fitted is None else keys_of(results[time_name(results)], fitted)
    steps, grid = pcs.shape[0], maps.shape[1:]
    size, _ = block_size(steps, maps[0].size, 0, REBUILD_BYTES_PER_VALUE, budget,
                         resident_bytes() if in_use is None else in_use, 1,
                         f"rebuilding {steps} steps x {maps[0].size} points")

    def rebuilt(block: np.ndarray, block_info=None) -> np.ndarray:
        values = np.tensordot(block, maps, axes=1)
        if fitted is not None:
            start, stop = block_info[0]["array-location"][0]
            values = unapply(values, fitted, keys.part(slice(start, stop)))
        return values.astype(np.float32)

    series = dask.array.from_array(pcs, chunks=(size, -1))
    data = series.map_blocks(rebuilt, drop_axis=1, new_axis=[1, 2], chunks=(series.chunks[0], *((n,) for n in grid)),
                             dtype=np.float32, name=f"climodes-rebuilt-{secrets.token_hex(8)}")
    return xr.DataArray(data, dims=(time_name(results), *results["eof"].dims[1:]))


def reconstruction_dataset(results: xr.Dataset, data: xr.DataArray, which: list[int], anomalies: bool,
                           source: Path, command: str) -> xr.Dataset:
    """The reconstruction as a CF dataset on the run's grid and time axis.

    The variable takes the input's name; its units are the input's for values
    (the fitted preparation's) and the maps' for anomalies (``1`` for a
    standardised field); the coordinates, the grid mapping and the time bounds
    are the results file's own, with their attributes.
    """
    config = stored_config(results)
    name = (config.get("input") or {}).get("variable") or "field"
    long_name = long_name_of(results) or name
    time = time_name(results)
    units = results["eof"].attrs.get("units") if anomalies else fitted_units(results)
    chosen = modes_text(which)
    attrs = {"long_name": (f"anomaly of {long_name}" if anomalies else long_name) + f", rebuilt from modes {chosen}",
             **({"units": units} if units else {}),
             "comment": ("sum over the modes of pc * eof" + ("" if anomalies else ", plus the preparation the run "
                         "removed (fitted_offset, fitted_scale, fitted_trend_*, fitted_climatology)")
                         + "; NaN where the run did not use the point")}
    if "grid_mapping" in results["eof"].attrs:
        attrs["grid_mapping"] = results["eof"].attrs["grid_mapping"]
    if "time_bnds" in results:
        attrs["cell_methods"] = f"{time}: mean"
    coords = {key: coord.variable.copy() for key, coord in results["eof"].coords.items() if key != "mode"}
    coords[time] = results[time].variable
    for dim, axis in zip(results["eof"].dims[1:], "YX"):  # the rows and columns (of a rotated grid, say) are axes
        if dim in coords:
            coords[dim].attrs.setdefault("axis", axis)
    ds = xr.Dataset({name: data.assign_attrs(attrs)}, coords=coords)
    for extra in ("time_bnds", attrs.get("grid_mapping")):
        if extra and extra in results:
            ds[extra] = results[extra].variable
    now = dt.datetime.now(dt.timezone.utc).replace(microsecond=0).isoformat()
    ds.attrs = {
        "Conventions": "CF-1.10",
        "title": f"{long_name} rebuilt from modes {chosen} of its EOF analysis"
                 + (" (anomalies)" if anomalies else ""),
        "institution": "unknown (produced by climodes)",
        "source": f"climodes {__version__}",
        "history": f"{now}: {command}",
        "date_created": now,
        "climodes_results": str(source),
        "climodes_modes": " ".join(map(str, which)),
        "climodes_config_sha256": results.attrs.get("climodes_config_sha256", "unknown"),
    }
    return ds


# --- the coefficient table


def coefficient_table(results: xr.Dataset) -> pd.DataFrame:
    """One row per time step: its time and calendar, each PC, each ``unexplained_fraction`` and the step's
    variance, and each rotated PC when the file has them.

    Columns: ``time`` (ISO date, and time of day where the steps have one), ``year`` (the season's year for
    seasonal means: December counts with the January after it), ``season`` (seasonal means), ``month``
    (steps of a month or shorter), ``day`` (daily steps or shorter), ``pc_K``, ``unexplained_fraction_K``,
    ``step_variance`` and ``rotated_pc_K``.
    """
    time = results[time_name(results)]
    config = stored_config(results)
    aggregate = (config.get("prepare") or {}).get("aggregate", "none")
    months = (config.get("select") or {}).get("months")
    stamps = [str(t)[:19].replace(" ", "T") for t in time.values]
    if all(s.endswith("T00:00:00") for s in stamps):
        stamps = [s[:10] for s in stamps]
    table: dict[str, object] = {"time": stamps}
    if aggregate == "seasonal":
        table["year"] = season_years(time, months)
        table["season"] = months_text(months)
    else:
        table["year"] = time.dt.year.values
    rule = key_rule(time)  # how far apart the steps are: yearly, month, month_day or bins of the year
    if aggregate == "none" and rule != "yearly":
        table["month"] = time.dt.month.values
    if aggregate == "none" and rule == "month_day":
        table["day"] = time.dt.day.values
    for name in ("pc", "unexplained_fraction", "step_variance", "rotated_pc"):  # where the file has them
        if name in results and "mode" in results[name].dims:
            table.update({f"{name}_{k}": results[name].sel(mode=k).values for k in results["mode"].values})
        elif name in results:
            table[name] = results[name].values
    return pd.DataFrame(table)


# --- projection


def check_same_grid(field: xr.DataArray, results: xr.Dataset, source: Path) -> None:
    """Refuse a field whose grid points are not those of the modes (same shape, order and coordinates
    within 1e-4 degrees, longitudes compared round the circle): climodes never regrids."""
    lat_name, lon_name = map_coordinates(results)
    lat, lon = (values.transpose(*results["eof"].dims[1:]).values
                for values in xr.broadcast(results[lat_name], results[lon_name]))
    new_lat, new_lon = grid_coordinates(field)
    what = f"{lat.shape[0]} x {lat.shape[1]} points"
    if new_lat.shape != lat.shape:
        raise UserError(f"input.paths: the field's grid ({new_lat.shape[0]} x {new_lat.shape[1]} points after "
                        f"select) is not the grid of the modes in {source} ({what}); select the training's region "
                        "or regrid the field to its grid (climodes never regrids)")
    apart = (np.abs(new_lat - lat) > 1e-4) | (np.abs((new_lon - lon + 180) % 360 - 180) > 1e-4)
    if apart.any():
        row, column = np.argwhere(apart)[0]
        raise UserError(f"input.paths: the field's grid point at row {row}, column {column} lies at lat "
                        f"{new_lat[row, column]:g}, lon {new_lon[row, column]:g}, but the modes in {source} have "
                        f"lat {lat[row, column]:g}, lon {lon[row, column]:g} there; give the field on the training's "
                        "grid, in the same order (climodes never regrids)")


def check_same_units(field: xr.DataArray, results: xr.Dataset, variable: str, source: Path) -> None:
    """Refuse a field in other units than the training's (as written in the files)."""
    given = field.attrs.get("units")
    trained = fitted_units(results)
    if units_key(given) != units_key(trained):
        said = f"in {given!r}" if given is not None else "without units"
        fitted = f"in {trained!r}" if trained is not None else "without units"
        raise UserError(f"input.variable: {variable} is {said}, but the modes in {source} were computed from a field "
                        f"{fitted}; convert the values (not just the attribute) to the training's units")


def _anomalies(block: np.ndarray, fitted: Fitted, keys: TimeKeys) -> np.ndarray:
    """A ``(time, point)`` block in float64 prepared by :func:`climodes.prepare.apply`: the fitted steps,
    missing values set to zero anomaly, the offset removed; points the run did not use (NaN quantities)
    count as zero."""
    anomaly = apply(block, fitted, keys)
    anomaly[:, np.isnan(fitted.quantities["offset"])] = 0.0
    return anomaly


def project_block(values, fitted: Fitted, keys: TimeKeys, weights: np.ndarray, maps: np.ndarray):
    """One block of latitude rows' part of the projection: ``A_b (w^2 eof)`` over its points ``(time,
    mode)``, its share of each step's weighted sum of squares ``||x_t||^2`` and its points' missing
    fractions.  ``fitted`` holds the block's points (flat, latitude rows first); ``maps`` is ``(point,
    mode)`` with 0 where a point was not used."""
    block = flat(values).astype(np.float64)
    fraction = np.isnan(block).mean(axis=0)
    anomaly = _anomalies(block, fitted, keys)
    return anomaly @ (maps * weights[:, None] ** 2), step_squares(anomaly, weights), [fraction]


def project_steps(values, fitted: Fitted, keys: TimeKeys, weights: np.ndarray, maps: np.ndarray, piece: int = 0):
    """One block of whole maps' part of the projection: its steps' rows of ``A (w^2 eof)`` ``(time, mode)``
    and their weighted sums of squares ``||x_t||^2`` (whole, not shares), and each point's count of
    missing values in the block.  ``keys`` are the block's steps' own.  The block is kept as read and
    worked on ``piece`` steps at a time (0: all at once), each piece's float64 copies made and dropped
    in turn: a projection takes each step on its own, so the pieces' rows are the block's."""
    block = flat(values)
    piece = piece or block.shape[0]
    scaled = maps * weights[:, None] ** 2
    products, squares, missing = [], [], 0
    for start in range(0, block.shape[0], piece):
        steps = slice(start, start + piece)
        part = block[steps].astype(np.float64)
        missing = missing + np.isnan(part).sum(axis=0)
        anomaly = _anomalies(part, fitted, keys.part(steps))
        products.append(anomaly @ scaled)
        squares.append(step_squares(anomaly, weights))
        del part, anomaly
    return (np.concatenate(products), np.concatenate(squares)), missing


def _block_fit(fitted: Fitted, points: slice) -> Fitted:
    """The quantities of some points of the grid, flattened with latitude rows first (a view)."""
    return Fitted(fitted.preparation, {name: q.reshape(q.shape[:-2] + (-1,))[..., points]
                                       for name, q in fitted.quantities.items()})


def _maps_in_time(storages: list[Storage]) -> int:
    """The steps of the files' chunks along time when every file stores whole maps together (chunks
    holding whole maps, or contiguous storage: 1), else 0."""
    if not storages or not all(s.chunks is None or s.whole_maps for s in storages):
        return 0
    return max(s.time_chunk for s in storages)


def _slabs_in_time(storages: list[Storage]) -> int:
    """The steps of the files' chunks along time when every file is compressed in chunks (spatial tiles,
    or whole maps), else 0: a block of rows would decompress a chunk once for each block it meets."""
    if not storages or not all(s.chunks is not None and s.compressed for s in storages):
        return 0
    return max(s.time_chunk for s in storages)


@dataclass(frozen=True)
class ProjectionOrder:
    """How a projection reads its field: the dask chunks it reads (``time``, ``lat``, ``lon``: -1 whole),
    the read order and why (the ``read order`` line of ``projection.log``), how many blocks of whole maps
    are read at once (0: blocks of latitude rows, as many as the workers) and how many steps of a block
    are worked on at a time (0: the whole block)."""

    chunks: dict[str, int]
    text: str
    readers: int = 0
    piece: int = 0


def plan_projection(shape: tuple[int, int, int], results: xr.Dataset, budget: int, in_use: int, workers: int,
                    storages: list[Storage], itemsize: int = 4, local: bool = True) -> ProjectionOrder:
    """The blocks to read a new ``(time, lat, lon)`` field of ``itemsize`` bytes a value in, within ``budget``
    bytes: a projection takes each step on its own, so it reads each chunk of the files once where it can.

    - Files that store whole maps together (``storages``: chunks of whole maps, model output's usual
      layout, or contiguous storage) are read in their own order, blocks of whole chunks along time worked
      on whole; one block at a time where a whole chunk a worker does not fit.
    - Files compressed in chunks (spatial tiles, or whole maps too big for that) are read in slabs: one
      chunk along time with every row, so each chunk is decompressed once, kept as read
      (:data:`~climodes.storage.SLAB_BYTES_PER_VALUE` itemsizes a value) and worked on a few steps at a
      time in float64; where a slab does not fit, in blocks of rows, which decompress a chunk once for
      each block it meets.
    - Other files (uncompressed tiles) are read in blocks of latitude rows with every step, each reading
      only its own part of the chunks.

    ``in_use`` is what the process holds before it reads, the results and their fitted preparation
    (read before it is measured) included: the blocks share the fit and copy no part of it.  Blocks are
    read ``workers`` at a time, or fewer where they do not fit, on a ``local`` scheduler (threads: one
    process; elsewhere every worker reads one).
    """
    steps, nlat, nlon = shape
    count = results.sizes["mode"]
    fixed = 3 * nlat * nlon * count * 8 + cache_held(storages, READ_CACHE)  # each file's chunk cache while it is read
    what = f"projecting {steps} steps x {nlat * nlon} points"
    layout = "; ".join(sorted({s.text() for s in storages}))
    choices = sorted({workers, 1} if local else {workers}, reverse=True)
    held = steps * (count + 1) * 8 + 4 * (workers + 3) * nlat * nlon * 8  # products kept, missing counts summed
    why = f"{layout}: a block of rows reads only its own part of the chunks"
    chunk = _maps_in_time(storages)
    if chunk:
        for readers in choices:
            try:
                size, _ = block_size(steps, nlat * nlon, fixed + held, PROJECT_BYTES_PER_VALUE, budget, in_use,
                                     readers, what, at_least=chunk)
            except UserError:
                continue
            if chunk <= size:
                size = max(chunk, min(size, steps) // chunk * chunk)
                return ProjectionOrder({"time": size, "lat": -1, "lon": -1},
                                       f"{-(-steps // size)} block(s) of {size} time steps, whole maps in the files' "
                                       "own order" + (f", {readers} at a time" if readers < workers else ""), readers)
        why = (f"{layout}: a block of {min(chunk, steps)} whole maps in float64, "
               f"{size_text(min(chunk, steps) * nlat * nlon * PROJECT_BYTES_PER_VALUE)}, does not fit compute.memory "
               f"{size_text(budget)} beside the rest of the plan")
    slab = min(_slabs_in_time(storages), steps)
    if slab:
        read = slab * nlat * nlon * SLAB_BYTES_PER_VALUE * itemsize  # a slab as read
        slabs = -(-steps // slab)
        for readers in sorted({min(r, slabs) for r in choices}, reverse=True):  # no more readers than slabs
            try:
                piece, _ = block_size(slab, nlat * nlon, fixed + held + readers * read, PROJECT_BYTES_PER_VALUE,
                                      budget, in_use, readers, what, at_least=slab)
            except UserError:
                continue
            return ProjectionOrder({"time": slab, "lat": -1, "lon": -1},
                                   f"{slabs} slab(s) of {slab} time steps x every row"
                                   + (f", {readers} at a time" if readers < min(workers, slabs) else "")
                                   + f", worked on {piece} step(s) at a time: each chunk of the files decompressed "
                                   f"once ({layout}; a slab as read, {size_text(read)}, fits compute.memory "
                                   f"{size_text(budget)})", readers, piece)
        why = (f"{layout}: a slab of {slab} time steps x every row, {size_text(read)} as read, does not fit "
               f"compute.memory {size_text(budget)} beside what the process holds before it reads "
               f"({size_text(in_use)}: the interpreter, its libraries, the results and their fitted preparation) "
               "and the rest of the plan, so each block of rows decompresses the chunks it meets")
    held = 4 * (workers + 3) * steps * (count + 1) * 8  # partial sums of the blocks' small products
    rows, _ = block_size(nlat, steps * nlon, fixed + held, PROJECT_BYTES_PER_VALUE, budget, in_use, workers, what)
    return ProjectionOrder({"time": -1, "lat": rows, "lon": -1},
                           f"{-(-nlat // rows)} block(s) of {rows} latitude rows ({why})")


def _take(part, which: int):
    return part[which]


def projected(field: xr.DataArray, results: xr.Dataset, fitted: Fitted, keys: TimeKeys,
              progress: Callable[[str], ContextManager], order: ProjectionOrder
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Read ``field`` once, block by block as it is chunked (see :func:`plan_projection`): blocks of whole
    maps along time, ``order.readers`` at a time (threads), each worked on ``order.piece`` steps at a time,
    when ``order.readers``, else of latitude rows, and project it onto the modes of ``results``.

    Returns each step's ``sum_x a w^2 eof_k`` ``(time, mode)``, its weighted sum of squares ``||x_t||^2``
    and each grid point's missing fraction (flat, latitude rows first).
    """
    count = results.sizes["mode"]
    maps = np.nan_to_num(np.asarray(results["eof"].values, dtype=np.float64).reshape(count, -1).T)
    weights = np.asarray(results["area_weight"].values, dtype=np.float64).reshape(-1)
    if order.readers:
        blocks, steps = time_blocks(field)  # every block needs the whole fit and maps: one key each, sent once
        whole, weights, maps = (dask.delayed(x, pure=True) for x in (_block_fit(fitted, slice(None)), weights, maps))
        parts = [dask.delayed(quietly(project_steps))(block, whole, keys.part(at), weights, maps, order.piece)
                 for block, at in zip(blocks, steps)]
        rows = [dask.delayed(_take)(part, 0) for part in parts]
        missing = tree_sum([dask.delayed(_take)(part, 1) for part in parts])
        with progress("projection: 1 pass over the field, in the files' own order"):
            rows, missing = dask.compute(rows, missing, num_workers=order.readers)
        products, squares = (np.concatenate(values) for values in zip(*rows))
        return products, squares, missing / field.sizes["time"]
    parts = [dask.delayed(quietly(project_block))(block, _block_fit(fitted, rows), keys, weights[rows], maps[rows])
             for block, rows in zip(field_blocks(field), row_slices(field))]
    with progress("projection: 1 pass over the field"):
        products, squares, fractions = dask.compute(tree_sum(parts))[0]
    return products, squares, np.concatenate(fractions)


def check_points(fraction: np.ndarray, results: xr.Dataset, field: xr.DataArray, max_missing: float,
                 source: Path) -> None:
    """Refuse a field that lacks a point the modes were computed from: missing at every step, or more
    often than the training's ``prepare.max_missing``."""
    used = results["point_status"].values.reshape(-1) == 2
    lat, lon = (c.reshape(-1) for c in grid_coordinates(field))
    for bad, how in ((used & (fraction >= 1), "has no value at any step"),
                     (used & (fraction < 1) & (fraction > max_missing), None)):
        if bad.any():
            first = int(np.argmax(bad))
            said = how or (f"is missing at {fraction[first]:.0%} of the steps, more than the training's "
                           f"prepare.max_missing ({max_missing:g})")
            raise UserError(f"input.paths: the grid point at lat {lat[first]:g}, lon {lon[first]:g}, which the modes "
                            f"in {source} were computed from, {said} in the field ({int(bad.sum())} such point(s)); "
                            "a projection needs every point the modes use: select a period where they have data")


def projection_variables(results: xr.Dataset, products: np.ndarray, squares: np.ndarray,
                         time: xr.DataArray) -> xr.Dataset:
    """The projection's variables: pseudo-PCs, their congruence and the fraction the modes leave unexplained.

    ``products`` is ``sum_x a w^2 eof_k`` at each step ``(time, mode)``, ``squares`` each step's
    ``||x_t||^2``.  The pseudo-PC is ``products / lambda_k``.  The congruence coefficient of the step's
    weighted anomaly map ``x_t = w a_t`` with the mode's weighted EOF ``w eof_k`` is their uncentred
    correlation, ``<x_t, w eof_k> / (||x_t|| ||w eof_k||)`` (Tucker's congruence coefficient; common practice
    for comparing patterns, e.g. Lorenzo-Seva and ten Berge 2006, Methodology 2, 57-64, from memory), from
    -1 to 1.  The weighted EOFs are orthogonal with ``||w eof_k||^2 = lambda_k``, so modes 1..k hold
    ``sum_{j<=k} lambda_j p_j(t)^2`` of ``||x_t||^2``, and :func:`climodes.diagnostics.unexplained_fractions`
    gives what they leave, as for the training steps.
    """
    eigenvalues = results["eigenvalue"].values
    count = eigenvalues.size
    maps = np.nan_to_num(results["eof"].values.reshape(count, -1))
    norms = np.sqrt(np.sum((maps * results["area_weight"].values.reshape(-1)) ** 2, axis=1))
    pcs = products / eigenvalues
    with np.errstate(invalid="ignore", divide="ignore"):
        congruence = products / (np.sqrt(np.where(squares > 0, squares, np.nan))[:, None] * norms)
    name = time.dims[0]
    return xr.Dataset(
        {
            "pc": (("mode", name), pcs.T, {
                "long_name": "pseudo-PC: the field's anomalies projected on the modes' EOFs", "units": "1",
                "comment": "sum over points of anomaly * area_weight^2 * eof / eigenvalue, the anomalies prepared "
                           "with the preparation fitted in the training run; on the scale of the training PCs "
                           "(the training field gives its own PCs)"}),
            "congruence": (("mode", name), congruence.T, {
                "long_name": "congruence coefficient of the step's weighted anomaly map with the mode's weighted EOF",
                "units": "1",
                "comment": "sum(w^2 a eof) / sqrt(sum(w^2 a^2) sum(w^2 eof^2)) over the points (Tucker's congruence "
                           "coefficient), -1 to 1; NaN where the step's anomalies are all zero"}),
            "unexplained_fraction": (("mode", name), unexplained_fractions(eigenvalues, pcs, squares).T, {
                "long_name": "fraction of the step's weighted anomaly variance that modes 1 to mode leave unexplained",
                "units": "1", "comment": "1 - sum over modes j <= mode of eigenvalue_j * pc_j^2 / sum(w^2 a^2)"}),
        },
        coords={"mode": ("mode", results["mode"].values, results["mode"].attrs), name: time},
    )


def history(*words: str | Path) -> str:
    """The command line, quoted for a shell: ``climodes project /data/results/run /data/other.yaml`` (callers give
    absolute paths, so that it reruns from any folder)."""
    return shlex.join(["climodes", *map(str, words)])
