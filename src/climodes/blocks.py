"""What the streaming solvers do to one block of the field, and how the blocks' results are added up.

A block holds every time step of some points, before the prepare steps along time (anomalies, trend:
TimeSteps) are applied.  With L the steps followed by centring, the anomaly matrix is A = L X.  On a
point with no missing value L is linear, so the streaming solvers take the cheap path there: they
multiply the field as read (only centred, to keep float32 products accurate) and apply L, or its
transpose, to their small (time x modes) products, once per pass instead of once per block.  Points
with missing values, and every point when a step is not linear (standardising), take the full path:
steps, missing-data rule and centring on the block itself.  The first pass prepares every point once
anyway, a few columns at a time, for each point's variance and lag-1 products (:func:`series_moments`:
the correlation maps and the red-noise test need them); the later passes take the cheap path.

The randomized solver works in the field's precision (float32 stays float32 in
flight); each block's small product is returned in float64, so the sums over
blocks accumulate in float64.
"""

from __future__ import annotations

import warnings
from typing import Callable

import dask
import numpy as np
import xarray as xr

from climodes.prepare import TimeSteps
from climodes.weights import usable_points


def prepare_block(values: np.ndarray, max_missing: float, dtype=np.float64) -> tuple[np.ndarray, np.ndarray]:
    """Apply the missing-data rule to a ``(time, point)`` block and centre it.

    Returns the anomaly block in ``dtype`` (missing values set to zero, then
    centred; unusable points all zero) and each point's missing fraction.
    """
    block = np.array(values, dtype=dtype).reshape(values.shape[0], -1)  # a copy: never change the input
    missing = np.isnan(block)
    fraction = missing.mean(axis=0)
    keep = usable_points(fraction, max_missing)
    block[missing] = 0.0
    block -= block.mean(axis=0, dtype=np.float64).astype(dtype)
    block[:, ~keep] = 0.0
    return block, fraction


def _columns(block: np.ndarray, which: np.ndarray) -> np.ndarray:
    """The ``which`` columns of a block, C-ordered (``block[:, which]`` is not, and slows every later step)."""
    return block if which.all() else np.compress(which, block, axis=1)


def full_path(block: np.ndarray, which: np.ndarray, steps: TimeSteps, max_missing: float, dtype):
    """Anomalies of the ``which`` points of a ``(time, point)`` block: steps, missing-data rule, centring.

    Points missing at every step (land in a sea field) are zero at once: the steps would only spend
    NaN-skipping means on them.
    """
    points = _columns(block, which)
    if points.shape[1] == 0:
        return np.zeros((block.shape[0], 0), dtype=dtype), np.zeros(0)
    has_data = ~np.isnan(points).all(axis=0)
    if has_data.all():
        return prepare_block(steps(points.astype(dtype, copy=False)), max_missing, dtype)
    anomaly, fraction = np.zeros(points.shape, dtype=dtype), np.ones(points.shape[1])
    if has_data.any():
        anomaly[:, has_data], fraction[has_data] = prepare_block(steps(_columns(points, has_data).astype(dtype)),
                                                                 max_missing, dtype)
    return anomaly, fraction


def _centred(points: np.ndarray, dtype) -> np.ndarray:
    """``points`` minus their time means, as a new array in ``dtype``."""
    return np.subtract(points, points.mean(axis=0, dtype=np.float64).astype(dtype), dtype=dtype)


def _cheap_path(block: np.ndarray, which: np.ndarray, dtype) -> np.ndarray:
    """The ``which`` points of a block as read, centred in ``dtype`` (their anomalies are L of this)."""
    return _centred(_columns(block, which), dtype)


def _squares(block: np.ndarray) -> np.ndarray:
    """Each column's sum of squares, accumulated in float64."""
    return np.einsum("ij,ij->j", block, block, dtype=np.float64)


def time_operator(steps: TimeSteps, series: np.ndarray) -> np.ndarray:
    """``L @ series``: the prepare steps then centring, applied to the columns of a ``(time, k)`` matrix."""
    out = steps(series)
    return out - out.mean(axis=0)


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


def flat(values: np.ndarray) -> np.ndarray:
    return values.reshape(values.shape[0], -1)


def _product(points: np.ndarray, other: np.ndarray):
    """``points @ other`` in float64, or 0 when the block has no such points: partial sums that are
    held while the blocks are added up then take no memory (numpy hands ``X @ X.T`` to BLAS syrk)."""
    return (points @ other).astype(np.float64, copy=False) if points.shape[1] else 0


def gram_part(values, weights, max_missing, steps):
    """The block's ``X X^T``: from the cheap points (L still to apply) and the full-path ones, float64."""
    block = flat(values)
    cheap = _complete(block, steps)
    fraction = np.zeros(block.shape[1])
    read = _cheap_path(block, cheap, np.float64)
    moments = np.empty((block.shape[1], 2))
    moments[cheap] = prepared_moments(read, steps)
    read *= weights[cheap]
    full, fraction[~cheap] = full_path(block, ~cheap, steps, max_missing, np.float64)
    moments[~cheap] = series_moments(full)
    full *= weights[~cheap]
    return _product(read, read.T), _product(full, full.T), [fraction], [moments]


def range_part(values, weights, max_missing, omega, steps):
    """The block's ``A w Omega`` and its share of the total variance ``sum(A w)^2``.

    The total variance needs every anomaly, so this pass applies the steps to the block itself; the
    complete points (see :func:`_complete`) skip the missing-data rule, and their weights go into
    ``Omega`` rather than into the block.
    """
    block = flat(values)
    work = omega.dtype
    complete = _complete(block, steps)
    fraction = np.zeros(block.shape[1])
    anomaly = _centred(steps(_columns(block, complete).astype(work, copy=False)), work)
    full, fraction[~complete] = full_path(block, ~complete, steps, max_missing, work)
    total = _squares(anomaly) @ weights[complete] ** 2 + _squares(full) @ weights[~complete] ** 2
    sample = (anomaly @ (omega[complete] * weights[complete, None]).astype(work)).astype(np.float64)
    sample += full @ (omega[~complete] * weights[~complete, None]).astype(work)
    moments = np.empty((block.shape[1], 2))
    moments[complete], moments[~complete] = series_moments(anomaly), series_moments(full)
    return sample, float(total), [fraction], [moments]


def series_moments(anomaly: np.ndarray) -> np.ndarray:
    """``(point, 2)``: each prepared (centred) series' sum of squares and sum of lag-1 products,
    ``sum_t a_t^2`` and ``sum_t a_t a_{t+1}``, in float64.  From them come each point's variance and
    lag-1 autocorrelation (correlation maps, the red-noise test) without another pass."""
    return np.stack([_squares(anomaly), np.einsum("ij,ij->j", anomaly[1:], anomaly[:-1], dtype=np.float64)],
                    axis=1)


def prepared_moments(read: np.ndarray, steps: TimeSteps, values: int = 1_000_000) -> np.ndarray:
    """:func:`series_moments` of ``L`` applied to the cheap path's centred points, a few columns at a
    time (about ``values`` values), so the prepared copy stays small."""
    width = max(1, values // max(read.shape[0], 1))
    out = np.empty((read.shape[1], 2))
    for start in range(0, read.shape[1], width):
        out[start:start + width] = series_moments(time_operator(steps, read[:, start:start + width]))
    return out


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
    full, _ = full_path(block, gappy, steps, max_missing, work)
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


def tree_sum(parts: list):
    """Pairwise sums as a dask graph: memory for a few partial sums, not for all of them."""
    while len(parts) > 1:
        paired = [dask.delayed(_add)(a, b) for a, b in zip(parts[::2], parts[1::2])]
        parts = paired + (parts[-1:] if len(parts) % 2 else [])
    return parts[0]


def field_blocks(field: xr.DataArray) -> list:
    """The field as delayed ``(time, lat rows, lon)`` blocks, all time steps in each."""
    data = field.data.rechunk({0: -1, 2: -1})
    return list(data.to_delayed().ravel())


def row_slices(field: xr.DataArray) -> list[slice]:
    starts = np.cumsum((0,) + field.data.rechunk({0: -1, 2: -1}).chunks[1])
    nlon = field.sizes["lon"]
    return [slice(a * nlon, b * nlon) for a, b in zip(starts[:-1], starts[1:])]


def path_points(fraction: np.ndarray, max_missing: float, steps: TimeSteps) -> tuple[np.ndarray, np.ndarray]:
    """After a first pass: the points that take the cheap path (see :func:`_complete`; when there are
    none, L is not applied at all, and it need not be linear then) and the other usable ones."""
    cheap = (fraction == 0) & steps.linear
    return cheap, usable_points(fraction, max_missing) & ~cheap
