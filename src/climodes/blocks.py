"""What the streaming solvers do to one block of the field, and how the blocks' results are added up.

A block holds every time step of some points, before the prepare steps along time (anomalies, trend:
TimeSteps) are applied.  With L the steps followed by centring, the anomaly matrix is A = L X.  On a
point with no missing value L is linear, so the streaming solvers take the cheap path there: they
multiply the field as read (only centred, to keep float32 products accurate) and apply L, or its
transpose, to their small (time x modes) products, once per pass instead of once per block.  Points
with missing values, and every point when a step is not linear (standardising), take the full path:
steps, missing-data rule and centring on the block itself.

Every step is fitted and applied by the same functions (:class:`~climodes.prepare.TimeSteps`) on a
block's columns and in L.  The first pass prepares every point once, a cheap point a few columns at a
time, and returns per block each point's missing fraction, the preparation fitted on its series (the
fit stored with the results) and its prepared series' variance and lag-1 products
(:func:`series_moments`: the correlation maps and the red-noise test need them), with no extra read;
the later passes take the cheap path.

The randomized solver works in the field's precision (float32 stays float32 in
flight); each block's small product is returned in float64, so the sums over
blocks accumulate in float64.
"""

from __future__ import annotations

import warnings
from typing import Callable

import dask
import dask.array
import numpy as np
import xarray as xr

from climodes.prepare import TimeSteps, centre
from climodes.weights import usable_points


def prepare_block(prepared: np.ndarray, max_missing: float, dtype=np.float64):
    """Apply the missing-data rule to a prepared ``(time, point)`` block and centre it.

    Returns the anomaly block in ``dtype`` (missing values set to zero, then
    centred by :func:`climodes.prepare.centre`; unusable points all zero),
    each point's missing fraction and the offset the centring removed.
    """
    block = np.asarray(prepared, dtype=dtype).reshape(prepared.shape[0], -1)
    fraction = np.isnan(block).mean(axis=0)
    keep = usable_points(fraction, max_missing)
    block, offset = centre(block)  # a new array: never change the input
    block[:, ~keep] = 0.0
    return block, fraction, offset


def _columns(block: np.ndarray, which: np.ndarray) -> np.ndarray:
    """The ``which`` columns of a block, C-ordered (``block[:, which]`` is not, and slows every later step)."""
    return block if which.all() else np.compress(which, block, axis=1)


def _place(fitted: dict, which: np.ndarray, part: dict) -> None:
    """Put the fitted quantities of the ``which`` points of a block (``part``) into the block's ``fitted``."""
    for name, values in part.items():
        fitted[name][..., which] = values


def _prepared(points: np.ndarray, steps: TimeSteps, max_missing: float, dtype):
    prepared, fitted = steps.fit_apply(points)
    anomaly, fraction, fitted["offset"] = prepare_block(prepared, max_missing, dtype)
    return anomaly, fraction, fitted


def full_path(block: np.ndarray, which: np.ndarray, steps: TimeSteps, max_missing: float, dtype):
    """Anomalies of the ``which`` points of a ``(time, point)`` block: the steps fitted and applied, the
    missing-data rule, centring.  Returns them, the points' missing fractions and their fitted quantities.

    Points missing at every step (land in a sea field) are zero at once, with NaN quantities: the steps
    would only spend NaN-skipping means on them.
    """
    points = _columns(block, which)
    fitted = steps.blank(points.shape[1], dtype)
    if points.shape[1] == 0:
        return np.zeros((block.shape[0], 0), dtype=dtype), np.zeros(0), fitted
    has_data = ~np.isnan(points).all(axis=0)
    if has_data.all():
        return _prepared(points.astype(dtype, copy=False), steps, max_missing, dtype)
    anomaly, fraction = np.zeros(points.shape, dtype=dtype), np.ones(points.shape[1])
    if has_data.any():
        anomaly[:, has_data], fraction[has_data], part = _prepared(_columns(points, has_data).astype(dtype), steps,
                                                                   max_missing, dtype)
        _place(fitted, has_data, part)
    return anomaly, fraction, fitted


def _centred(points: np.ndarray, dtype) -> np.ndarray:
    """``points`` minus their time means, as a new array in ``dtype``."""
    return np.subtract(points, points.mean(axis=0, dtype=np.float64).astype(dtype), dtype=dtype)


def _cheap_path(block: np.ndarray, which: np.ndarray, dtype) -> np.ndarray:
    """The ``which`` points of a block as read, centred in ``dtype`` (their anomalies are L of this)."""
    return _centred(_columns(block, which), dtype)


FIT_VALUES = 2**21  # values of a block fitted at a time on the cheap path: the steps' working copies stay small


def _fitted(block: np.ndarray, which: np.ndarray, steps: TimeSteps, weights: np.ndarray,
            gram: np.ndarray) -> tuple[dict, np.ndarray]:
    """The preparation fitted on the ``which`` points of a block as read (in float64), and the
    :func:`series_moments` of their prepared series, a few columns at a time; their weighted anomalies
    are added to ``gram`` (see :func:`add_gram`) as they are made, and not kept."""
    points = _columns(block, which)
    fitted = steps.blank(points.shape[1])
    moments = np.empty((points.shape[1], 2))
    width = max(1, FIT_VALUES // block.shape[0])
    for start in range(0, points.shape[1], width):
        columns = slice(start, start + width)
        prepared, quantities = steps.fit_apply(points[:, columns].astype(np.float64))
        anomaly, quantities["offset"] = centre(prepared)
        for name, values in quantities.items():
            fitted[name][..., columns] = values
        moments[columns] = series_moments(anomaly)
        anomaly *= weights[columns]
        add_gram(gram, anomaly)
    return fitted, moments


def add_gram(gram: np.ndarray, block: np.ndarray) -> None:
    """Add ``block @ block.T`` of a C-ordered float64 ``(time, point)`` block to the upper triangle of the
    Fortran-ordered ``gram`` in place (BLAS ``dsyrk``): no temporary time x time matrix.  The lower triangle
    is filled once, by :func:`symmetric`, when every block has been added."""
    if block.shape[1]:
        import scipy.linalg.blas

        scipy.linalg.blas.dsyrk(1.0, np.ascontiguousarray(block).T, beta=1.0, c=gram, trans=1, overwrite_c=True)


def symmetric(gram: np.ndarray, width: int = 512) -> np.ndarray:
    """``gram`` with its lower triangle copied from its upper one, in place, ``width`` columns at a time."""
    for start in range(width, gram.shape[0], width):
        gram[start:start + width, :start] = gram[:start, start:start + width].T
    for start in range(0, gram.shape[0], width):
        band = slice(start, start + width)
        gram[band, band] = np.triu(gram[band, band]) + np.triu(gram[band, band], 1).T
    return gram


def _squares(block: np.ndarray) -> np.ndarray:
    """Each column's sum of squares, accumulated in float64."""
    return np.einsum("ij,ij->j", block, block, dtype=np.float64)


def time_operator(steps: TimeSteps, series: np.ndarray) -> np.ndarray:
    """``L @ series``: the prepare steps fitted and applied, then centring, on the columns of a ``(time, k)``
    matrix.  Each fit is linear in a complete series (a mean per calendar key, a least-squares line, a time
    mean), so this is a linear map, and the same functions as on the field's own columns."""
    return centre(steps(series))[0]


def time_operator_transposed(steps: TimeSteps, series: np.ndarray, width: int = 512) -> np.ndarray:
    """``L^T @ series``, from the columns of ``L`` computed ``width`` at a time as ``L`` of the identity's."""
    n = series.shape[0]
    out = np.empty((n, series.shape[1]))
    for start in range(0, n, width):
        columns = time_operator(steps, np.eye(n, min(width, n - start), -start))
        out[start:start + columns.shape[1]] = columns.T @ series
    return out


def _complete(block: np.ndarray, steps: TimeSteps) -> np.ndarray:
    """The points of a block that take the cheap path: no missing value, and linear steps."""
    if not steps.linear:
        return np.zeros(block.shape[1], dtype=bool)
    return ~np.isnan(block).any(axis=0)


def quietly(function: Callable) -> Callable:
    """Run ``function`` with 0/0 warnings silenced: all-missing points make them on the way."""

    def wrapped(*args):
        with warnings.catch_warnings(), np.errstate(invalid="ignore", divide="ignore"):
            warnings.simplefilter("ignore", RuntimeWarning)
            return function(*args)

    return wrapped


class FieldBlock:
    """Every time step of some latitude rows of the field, not read yet.

    The task that works on a block reads it (every file's piece, joined) when it starts, so on a
    distributed scheduler a block is read on the worker that reduces it and never travels.  (A plain
    class: dask would look inside a dataclass and read the block as a task of its own.)
    """

    def __init__(self, data: dask.array.Array):
        self.data = data

    def read(self) -> np.ndarray:
        return np.asarray(self.data.compute(scheduler="synchronous"))


def flat(values: np.ndarray | FieldBlock) -> np.ndarray:
    """A block as a ``(time, point)`` matrix, read first if it is a :class:`FieldBlock`."""
    if isinstance(values, FieldBlock):
        values = values.read()
    return values.reshape(values.shape[0], -1)


def _product(points: np.ndarray, other: np.ndarray):
    """``points @ other`` in float64, or 0 when the block has no such points: partial sums that are
    held while the blocks are added up then take no memory (numpy hands ``X @ X.T`` to BLAS syrk)."""
    return (points @ other).astype(np.float64, copy=False) if points.shape[1] else 0


def gram_part(values, weights, max_missing, steps):
    """The block's ``X X^T`` (upper triangle, see :func:`add_gram`), every point prepared on the block (the
    complete ones a few columns at a time), in float64; and the block's missing fractions, fitted
    quantities and :func:`series_moments`."""
    block = flat(values)
    cheap = _complete(block, steps)
    fraction = np.zeros(block.shape[1])
    fitted = steps.blank(block.shape[1])
    moments = np.empty((block.shape[1], 2))
    gram = np.zeros((block.shape[0], block.shape[0]), order="F")
    part, moments[cheap] = _fitted(block, cheap, steps, weights[cheap], gram)
    _place(fitted, cheap, part)
    full, fraction[~cheap], part = full_path(block, ~cheap, steps, max_missing, np.float64)
    _place(fitted, ~cheap, part)
    moments[~cheap] = series_moments(full)
    full *= weights[~cheap]
    add_gram(gram, _columns(full, fraction[~cheap] < 1))  # points missing at every step add nothing
    return gram, [(fraction, fitted, moments)]


def range_part(values, weights, max_missing, omega, steps):
    """The block's ``A w Omega`` and its share of each step's weighted sum of squares ``sum_x (a w)^2`` (whose
    sum over the steps is the total variance times ``n - 1``); and the block's missing fractions and fitted
    quantities.

    The sums of squares need every anomaly, so this pass fits and applies the steps on the block itself;
    the complete points (see :func:`_complete`) skip the missing-data rule, and their weights go into
    ``Omega`` rather than into the block.
    """
    block = flat(values)
    work = omega.dtype
    complete = _complete(block, steps)
    fraction = np.zeros(block.shape[1])
    fitted = steps.blank(block.shape[1], work)
    prepared, part = steps.fit_apply(_columns(block, complete).astype(work, copy=False))
    anomaly, part["offset"] = centre(prepared)
    _place(fitted, complete, part)
    full, fraction[~complete], part = full_path(block, ~complete, steps, max_missing, work)
    _place(fitted, ~complete, part)
    squares = step_squares(anomaly, weights[complete]) + step_squares(full, weights[~complete])
    sample = (anomaly @ (omega[complete] * weights[complete, None]).astype(work)).astype(np.float64)
    sample += full @ (omega[~complete] * weights[~complete, None]).astype(work)
    moments = np.empty((block.shape[1], 2))
    moments[complete], moments[~complete] = series_moments(anomaly), series_moments(full)
    return sample, squares, [(fraction, fitted, moments)]


def step_squares(anomaly: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """Each step's weighted sum of squares over the points of a ``(time, point)`` block,
    ``sum_x (w_x a_tx)^2``, accumulated in float64: the block's share of ``||x_t||^2``."""
    return np.einsum("ij,ij,j->i", anomaly, anomaly, np.square(weights, dtype=np.float64), dtype=np.float64)


def series_moments(anomaly: np.ndarray) -> np.ndarray:
    """``(point, 2)``: each prepared (centred) series' sum of squares and sum of lag-1 products,
    ``sum_t a_t^2`` and ``sum_t a_t a_{t+1}``, in float64.  From them come each point's variance and
    lag-1 autocorrelation (correlation maps, the red-noise test) without another pass."""
    return np.stack([_squares(anomaly), np.einsum("ij,ij->j", anomaly[1:], anomaly[:-1], dtype=np.float64)],
                    axis=1)


def power_part(values, weights, max_missing, cheap, gappy, basis, basis_t, steps):
    """``X X^T Q`` over the block (the cheap points' part still to be multiplied by L), and the block's
    rows of ``A^T Q`` (NaN at unused points); ``basis_t`` is ``L^T Q``.  ``cheap`` and ``gappy`` (usable
    points with missing values) come from the first pass; the other points are not used and cost nothing."""
    block = flat(values)
    work = basis.dtype
    projected = np.full((block.shape[1], basis.shape[1]), np.nan)
    read = _cheap_path(block, cheap, work)
    projected[cheap] = read.T @ basis_t
    read_product = _product(read, (projected[cheap] * weights[cheap, None] ** 2).astype(work))
    full = full_path(block, gappy, steps, max_missing, work)[0]
    projected[gappy] = full.T @ basis
    full_product = _product(full, (projected[gappy] * weights[gappy, None] ** 2).astype(work))
    return read_product, full_product, [projected]


def regression_part(values, max_missing, cheap, gappy, series, series_t, steps):
    """The block's rows of ``A^T series`` (NaN at unused points); ``series_t`` is ``L^T series``."""
    block = flat(values)
    maps = np.full((block.shape[1], series.shape[1]), np.nan)
    maps[cheap] = _cheap_path(block, cheap, series.dtype).T @ series_t
    maps[gappy] = full_path(block, gappy, steps, max_missing, series.dtype)[0].T @ series
    return maps


def _add(a, b):
    if isinstance(a, tuple):
        return tuple(x + y for x, y in zip(a, b))
    return a + b


def joined(pieces: list[tuple[np.ndarray, dict, np.ndarray]]) -> tuple[np.ndarray, dict, np.ndarray]:
    """The blocks' first-pass pieces (missing fraction, fitted quantities, :func:`series_moments`), in
    block order, as whole-grid arrays.

    The pieces are taken off the list as they are copied, so the memory held is that of the whole
    grid's quantities and one block's, not twice the grid's.
    """
    fraction = np.concatenate([f for f, _, _ in pieces])
    moments = np.concatenate([m for _, _, m in pieces])
    fitted = {name: np.empty(q.shape[:-1] + (fraction.size,), dtype=q.dtype) for name, q in pieces[0][1].items()}
    start = 0
    while pieces:
        _, part, _ = pieces.pop(0)
        width = next(iter(part.values())).shape[-1]
        for name, values in part.items():
            fitted[name][..., start:start + width] = values
        start += width
    return fraction, fitted, moments


def _added_in_place(total: tuple, part: tuple) -> tuple:
    np.add(total[0], part[0], out=total[0])
    return (total[0], *(a + b for a, b in zip(total[1:], part[1:])))


def chained_sum(parts: list):
    """The sum of ``(matrix, list, ...)`` parts as one chain, each part added in place to the sum of those
    before it, in order (the lists joined in block order): while the workers make the next parts, one
    sum is held, not the partial sums of a tree."""
    total = parts[0]
    for part in parts[1:]:
        total = dask.delayed(_added_in_place)(total, part)
    return total


def tree_sum(parts: list):
    """Pairwise sums as a dask graph: memory for a few partial sums, not for all of them."""
    while len(parts) > 1:
        paired = [dask.delayed(_add)(a, b) for a, b in zip(parts[::2], parts[1::2])]
        parts = paired + (parts[-1:] if len(parts) % 2 else [])
    return parts[0]


def field_blocks(field: xr.DataArray) -> list:
    """The field as ``(time, lat rows, lon)`` blocks, all time steps in each.

    On a local scheduler they are the dask array's own chunks, read by tasks of their own, which the
    scheduler orders to keep memory low.  Where ``climodes.read-blocks-in-task`` is set (the distributed
    schedulers of :mod:`climodes.cluster`), each is a :class:`FieldBlock` carrying its own part of the
    graph only, read by the task that reduces it: its pieces then never travel between workers.
    """
    data = field.data.rechunk({0: -1, 2: -1})
    if dask.config.get("climodes.read-blocks-in-task", False):
        return [FieldBlock(dask.optimize(data.blocks[:, i])[0]) for i in range(data.numblocks[1])]
    return list(data.to_delayed().ravel())


def time_blocks(field: xr.DataArray) -> tuple[list, list[slice]]:
    """The field as ``(time, lat, lon)`` blocks of whole maps, its own dask chunks along time (each within
    one file, see :func:`climodes.fields.rechunked`), and the steps each holds; read as
    :func:`field_blocks` reads its blocks."""
    data = field.data.rechunk({1: -1, 2: -1})
    starts = np.cumsum((0,) + data.chunks[0])
    steps = [slice(int(a), int(b)) for a, b in zip(starts[:-1], starts[1:])]
    if dask.config.get("climodes.read-blocks-in-task", False):
        return [FieldBlock(dask.optimize(data.blocks[i])[0]) for i in range(data.numblocks[0])], steps
    return list(data.to_delayed().ravel()), steps


def row_slices(field: xr.DataArray) -> list[slice]:
    starts = np.cumsum((0,) + field.data.rechunk({0: -1, 2: -1}).chunks[1])
    nlon = field.sizes["lon"]
    return [slice(a * nlon, b * nlon) for a, b in zip(starts[:-1], starts[1:])]


def path_points(fraction: np.ndarray, max_missing: float, steps: TimeSteps) -> tuple[np.ndarray, np.ndarray]:
    """After a first pass: the points that take the cheap path (see :func:`_complete`; when there are
    none, L is not applied at all, and it need not be linear then) and the other usable ones."""
    cheap = (fraction == 0) & steps.linear
    return cheap, usable_points(fraction, max_missing) & ~cheap
