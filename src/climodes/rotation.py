"""Varimax rotation of the kept modes (``modes.rotate: varimax``).

Kaiser (1958), "The varimax criterion for analytic rotation in factor
analysis", Psychometrika 23, 187-200 (pages from memory): among the orthogonal rotations ``R`` of
a ``(point, mode)`` loading matrix ``L``, take the one that maximises the
variance of the squared loadings of each rotated column, summed over the
columns,

    V(R) = sum_k [ mean_i b_ik^4 - (mean_i b_ik^2)^2 ],   B = L R,

so that each rotated pattern is large at few points and near zero elsewhere.

The loadings are the patterns scaled by the square root of their eigenvalues
(the usual practice): in the weighted space of the decomposition,
``w * eof_k = V_k sqrt(lambda_k)`` (with ``X = A W = U S V^T``; see
:mod:`climodes.solvers`), so ``L = W E`` for the EOF maps ``E``.  Kaiser's row
normalisation (each point's loadings scaled to unit length before rotating) is
**not** used: it would divide out each point's area weight, so that every grid
point counted alike whatever its area, and divide by the small loadings of
points the kept modes hardly explain.

Since ``A ~= P E^T`` with ``P`` the PCs, ``P E^T = (P R)(E R)^T`` for any
orthogonal ``R``: the rotated maps are ``E R``, the rotated PCs ``P R`` (still
zero mean, unit variance and uncorrelated, as ``R`` is orthogonal), and the
rotated modes rebuild the same field.  The variance along rotated mode ``k``
is the squared length of its loading column, ``sum_i (L R)_ik^2``; the rotated
variances sum to the kept modes' total.  Rotated modes are ordered by that
variance and signed by the rule of the unrotated ones (:func:`sign_rule`).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from climodes.grid import grid_coordinates
from climodes.solvers import sign_rule

MAX_ITERATIONS = 2000
TOLERANCE = 1e-13  # largest change of an entry of the rotation between two iterations, at convergence


def varimax(loadings: np.ndarray) -> tuple[np.ndarray, bool]:
    """The orthogonal rotation ``R`` that maximises Kaiser's varimax criterion of ``loadings @ R``.

    Each iteration takes the gradient of the criterion at the current rotation,
    ``G = L^T (B^3 - B diag(mean_i b_ik^2))`` (up to a constant factor), and the
    orthogonal matrix nearest to it, ``U V^T`` from the SVD ``G = U S V^T``
    (the orthogonal Procrustes solution), which never lowers the criterion
    (common practice for varimax since the 1970s; the derivation is the
    criterion's derivative).  It starts from no rotation and stops when no
    entry of ``R`` changes by more than :data:`TOLERANCE`.

    Parameters
    ----------
    loadings
        ``(point, mode)`` loading matrix, rows not normalised.

    Returns
    -------
    rotation, converged
        The ``(mode, mode)`` orthogonal rotation, and whether it converged within :data:`MAX_ITERATIONS`.

    >>> c, s = np.cos(np.pi / 6), np.sin(np.pi / 6)   # simple patterns turned by 30 degrees
    >>> L = np.array([[2.0, 0.0], [0.0, 1.0], [0.0, 0.5]]) @ np.array([[c, -s], [s, c]])
    >>> np.round(np.abs(L @ varimax(L)[0]), 6).tolist()
    [[2.0, 0.0], [0.0, 1.0], [0.0, 0.5]]
    """
    rotation = np.eye(loadings.shape[1])
    for _ in range(MAX_ITERATIONS):
        rotated = loadings @ rotation
        gradient = loadings.T @ (rotated**3 - rotated * np.mean(rotated**2, axis=0))
        u, _, vt = np.linalg.svd(gradient)
        change = np.abs(u @ vt - rotation).max()
        rotation = u @ vt
        if change < TOLERANCE:
            return rotation, True
    return rotation, False


def rotated_variables(modes: xr.Dataset, total_variance: float, units: str | None) -> tuple[xr.Dataset, list[str]]:
    """The kept modes rotated by varimax: ``rotated_eof(mode, lat, lon)``, ``rotated_pc(mode, time)`` and
    ``rotated_variance_explained(mode)``, and notes (when the rotation did not converge).

    Parameters
    ----------
    modes
        The solver's modes: ``eof``, ``pc``, ``area_weight`` and ``point_status``.
    total_variance
        The weighted field's total variance.
    units
        The units of the EOF maps.
    """
    count = modes.sizes["mode"]
    used = modes["point_status"].values.reshape(-1) == 2
    maps = modes["eof"].values.reshape(count, -1).T  # (point, mode), NaN where not used
    loadings = maps[used] * modes["area_weight"].values.reshape(-1)[used, None]
    rotation, converged = varimax(loadings)
    variance = np.sum((loadings @ rotation) ** 2, axis=0)
    rotation = rotation[:, np.argsort(-variance, kind="stable")]
    lat, lon = (c.reshape(-1) for c in grid_coordinates(modes))
    rotation = rotation * sign_rule(maps @ rotation, lat, lon)
    variance = np.sum((loadings @ rotation) ** 2, axis=0)
    time = modes["pc"].dims[1]
    how = ("varimax (Kaiser 1958) of the loadings area_weight * eof, the EOFs scaled by the square root of their "
           "eigenvalues, without Kaiser's row normalisation; rotated modes ordered by their variance")
    out = xr.Dataset(
        {
            "rotated_eof": (("mode", *modes["eof"].dims[1:]), (maps @ rotation).T.reshape(modes["eof"].shape), {
                "long_name": "varimax-rotated EOF map: regression of the anomaly on the rotated PC",
                **({"units": units} if units else {}),
                "comment": f"eof times the rotation: {how}; the largest absolute value of each map is positive"}),
            "rotated_pc": (("mode", time), rotation.T @ modes["pc"].values, {
                "long_name": "varimax-rotated principal component", "units": "1",
                "comment": "pc times the rotation: zero mean, unit variance (ddof=1) and uncorrelated, like pc"}),
            "rotated_variance_explained": ("mode", variance / total_variance, {
                "long_name": "fraction of the weighted total variance along the rotated mode", "units": "1",
                "comment": "sums to the variance_explained of the kept modes"}),
        },
        coords={"mode": modes["mode"]},
    )
    notes = [] if converged else [f"the varimax rotation had not converged after {MAX_ITERATIONS} iterations; the "
                                  "rotated modes are those of its last iteration"]
    return out, notes
