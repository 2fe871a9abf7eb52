"""The decomposition: weighted anomalies in, eigenvalues, PCs and EOF maps out.

Conventions (they are the results contract):

- ``X = A * w``: the centred anomaly matrix ``A`` (time x points) times the
  square-root area weights ``w``; its SVD is ``X = U S V^T``.
- eigenvalue ``lambda_k = s_k^2 / (n - 1)`` for ``n`` time steps, the
  variance of the weighted field along mode ``k``.
- PC ``pc_k = sqrt(n - 1) * U[:, k]``: zero mean, unit variance (ddof=1).
- EOF map ``eof_k = A^T pc_k / (n - 1)``: the regression of the unweighted
  anomaly on the standardised PC, in the field's units, so that
  ``A ~= sum_k pc_k eof_k``.  Computed from ``A`` rather than by dividing by
  ``w``, it stays defined where a weight is zero (a pole).
- sign: see :func:`sign_rule`.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg
import xarray as xr

from climodes.errors import UserError
from climodes.weights import usable_points


@dataclass
class Decomposition:
    """Leading modes of a centred ``(time, point)`` anomaly matrix."""

    eigenvalues: np.ndarray
    pcs: np.ndarray
    patterns: np.ndarray
    total_variance: float
    next_eigenvalue: float
    method: str


@dataclass
class PointCounts:
    """How the missing-data rule treated the grid points."""

    grid: int
    used: int
    always_missing: int
    too_often_missing: int
    filled_values: int
    notes: list[str] = field(default_factory=list)


def exact_modes(anomaly: np.ndarray, weights: np.ndarray, count: int) -> Decomposition:
    """The ``count`` leading modes by a full LAPACK SVD (``gesdd``) of the weighted matrix.

    Parameters
    ----------
    anomaly
        ``(time, point)`` anomalies, centred in time, without NaN.
    weights
        ``(point,)`` square-root area weights.
    count
        Number of modes.
    """
    n = anomaly.shape[0] - 1
    weighted = anomaly * weights
    u, s, _ = scipy.linalg.svd(weighted, full_matrices=False, lapack_driver="gesdd", check_finite=False)
    spectrum = s**2 / n
    pcs = u[:, :count] * np.sqrt(n)
    patterns = anomaly.T @ pcs / n
    return Decomposition(
        eigenvalues=spectrum[:count],
        pcs=pcs,
        patterns=patterns,
        total_variance=float(np.sum(weighted**2) / n),
        next_eigenvalue=float(spectrum[count]) if spectrum.size > count else 0.0,
        method="exact: LAPACK gesdd SVD of the in-memory weighted (time x point) matrix",
    )


def sign_rule(patterns: np.ndarray, lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    """The sign (+1 or -1) that makes each mode follow the climodes sign rule.

    The rule: **the largest absolute value of each EOF map is positive**.
    Where several points come within 1e-6 (relative) of that largest value,
    the southernmost of them decides, then the westernmost counting longitude
    from 0 to 360.  It looks at the map only, so it does not depend on the
    solver, the chunking or the order of the grid in the file.

    Parameters
    ----------
    patterns
        ``(point, mode)`` EOF maps.
    lat, lon
        ``(point,)`` coordinates of the points.
    """
    signs = np.ones(patterns.shape[1])
    for k in range(patterns.shape[1]):
        size = np.abs(patterns[:, k])
        near_top = np.flatnonzero(size >= size.max() * (1 - 1e-6))
        first = near_top[np.lexsort((lon[near_top] % 360, lat[near_top]))[0]]
        signs[k] = 1.0 if patterns[first, k] >= 0 else -1.0
    return signs


def load_matrix(anomaly: xr.DataArray, max_missing: float) -> tuple[np.ndarray, np.ndarray, PointCounts]:
    """Read the prepared field into a centred ``(time, point)`` matrix of usable points.

    This is where the data are read: the one ``compute`` of the run.

    Returns
    -------
    matrix, keep, counts
        The matrix of usable points (missing anomalies set to zero, then
        centred), the boolean mask of usable points over the flattened grid,
        and the counts of the missing-data rule.
    """
    with warnings.catch_warnings():  # all-missing points divide 0 by 0 on the way; they are dropped below
        warnings.simplefilter("ignore", RuntimeWarning)
        values = np.asarray(anomaly.values, dtype=np.float64).reshape(anomaly.sizes["time"], -1)
    missing = np.isnan(values)
    fraction = missing.mean(axis=0)
    keep = usable_points(fraction, max_missing)
    counts = PointCounts(
        grid=values.shape[1],
        used=int(keep.sum()),
        always_missing=int(np.sum(fraction == 1)),
        too_often_missing=int(np.sum((fraction < 1) & ~keep)),
        filled_values=int(missing[:, keep].sum()),
    )
    if counts.used == 0:
        raise UserError("select: no grid point has enough data "
                        f"({counts.always_missing} missing at every step, {counts.too_often_missing} at more than "
                        f"prepare.max_missing={max_missing:g} of the steps); widen the region or raise max_missing")
    matrix = np.where(missing[:, keep], 0.0, values[:, keep])
    matrix -= matrix.mean(axis=0)
    if counts.too_often_missing:
        counts.notes.append(f"dropped {counts.too_often_missing} points missing at more than "
                            f"{max_missing:.0%} of the steps")
    if counts.filled_values:
        counts.notes.append(f"set {counts.filled_values} missing values at {np.sum(missing[:, keep].any(0))} "
                            "points to zero anomaly")
    return matrix, keep, counts


def solve(anomaly: xr.DataArray, weights: xr.DataArray, count: int, max_missing: float
          ) -> tuple[xr.Dataset, Decomposition, PointCounts]:
    """Decompose a prepared ``(time, lat, lon)`` field into its ``count`` leading modes.

    Returns
    -------
    modes, decomposition, counts
        ``modes`` holds ``eof(mode, lat, lon)`` (NaN at unused points),
        ``pc(mode, time)``, ``eigenvalue(mode)`` and ``variance_explained(mode)``.
    """
    matrix, keep, counts = load_matrix(anomaly, max_missing)
    if matrix.shape[1] < count:
        raise UserError(f"modes.count: {count} modes asked for, but only {matrix.shape[1]} grid points have data; "
                        "lower modes.count or widen the region")
    lat2d, lon2d = xr.broadcast(anomaly["lat"], anomaly["lon"])
    w = weights.values.reshape(-1)[keep]
    result = exact_modes(matrix, w, count)
    if result.total_variance == 0 or result.eigenvalues[0] <= 1e-12 * max(result.total_variance, 1e-300):
        raise UserError("input.variable: the prepared field is constant in time at every point, "
                        "so it has no modes; check the variable and prepare settings")
    signs = sign_rule(result.patterns, lat2d.values.reshape(-1)[keep], lon2d.values.reshape(-1)[keep])
    result.pcs *= signs
    result.patterns *= signs

    maps = np.full((count, keep.size), np.nan)
    maps[:, keep] = result.patterns.T
    mode = xr.DataArray(np.arange(1, count + 1), dims="mode")
    modes = xr.Dataset(
        {
            "eof": (("mode", "lat", "lon"), maps.reshape(count, anomaly.sizes["lat"], anomaly.sizes["lon"])),
            "pc": (("mode", "time"), result.pcs.T),
            "eigenvalue": ("mode", result.eigenvalues),
            "variance_explained": ("mode", result.eigenvalues / result.total_variance),
        },
        coords={"mode": mode, "time": anomaly["time"], "lat": anomaly["lat"], "lon": anomaly["lon"]},
    )
    return modes, result, counts
