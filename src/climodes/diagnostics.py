"""What the modes can be trusted for: sampling errors, separability, the spectrum, correlation maps, residuals.

North et al. (1982), "Sampling errors in the estimation of empirical
orthogonal functions", Mon. Wea. Rev. 110, 699-706: an eigenvalue estimated
from ``N`` independent samples has a standard error of about
``lambda * sqrt(2 / N)``, and a mode whose error is as large as the gap to a
neighbouring eigenvalue is mixed with that neighbour ("North's rule of thumb").

Consecutive steps of a climate series are not independent, and each mode has
its own memory: a slow mode has fewer independent samples than a fast one.  So
each mode's error uses the effective sample size ``N*`` of its own PC (see
:func:`red_noise_sample_size`), and no mode's error depends on how many other
modes were kept.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import xarray as xr

BRETHERTON = ("Bretherton et al. 1999, J. Climate 12, 1990-2009, eq. for the effective number of degrees of "
              "freedom of a variance of red noise (derived in climodes.diagnostics; equation number from memory)")


def lag1_autocorrelation(series: np.ndarray) -> np.ndarray:
    """Lag-1 autocorrelation of each column of ``series`` (time, k).

    ``sum_t x_t x_{t+1} / sum_t x_t^2`` of the series minus its mean, the usual
    estimate (common practice).

    >>> float(lag1_autocorrelation(np.array([[1.0], [2.0], [3.0], [4.0]]))[0])
    0.25
    """
    x = series - series.mean(axis=0)
    return np.sum(x[1:] * x[:-1], axis=0) / np.sum(x * x, axis=0)


def red_noise_sample_size(steps: int, lag1: np.ndarray | float) -> np.ndarray:
    """The effective sample size of a variance estimated from ``steps`` values of red noise.

    ``N* = N (1 - r^2) / (1 + r^2)`` for lag-1 autocorrelation ``r``
    (Bretherton et al. 1999, J. Climate 12, 1990-2009, eq. for the effective
    number of degrees of freedom of a variance of red noise; derived here,
    equation number from memory), at least 2.

    Derivation.  Let ``x_t`` be a stationary Gaussian series of variance
    ``s^2`` and autocorrelation ``rho_k``, and ``v = (1/N) sum_t x_t^2`` its
    sample variance (about a known mean).  By Isserlis' theorem
    ``cov(x_t^2, x_u^2) = 2 s^4 rho_{t-u}^2``, so

        var(v) = (2 s^4 / N^2) sum_t sum_u rho_{t-u}^2
               ~ (2 s^4 / N) sum_{k=-inf}^{inf} rho_k^2       (N large).

    ``N`` independent values give ``var(v) = 2 s^4 / N``; the series is worth
    ``N* = N / sum_k rho_k^2`` of them.  For red noise (AR(1))
    ``rho_k = r^|k|``, and ``sum_k r^(2|k|) = 1 + 2 r^2 / (1 - r^2) =
    (1 + r^2) / (1 - r^2)``, hence the form above.  It depends on ``r^2``: a
    series that alternates in sign is as short of independent values as a
    persistent one.  ``tests/test_diagnostics.py`` checks it by Monte Carlo.

    >>> float(red_noise_sample_size(100, 0.5))
    60.0
    """
    r2 = np.asarray(lag1, dtype=float) ** 2
    return np.maximum(steps * (1 - r2) / (1 + r2), 2.0)


def north_errors(eigenvalues: np.ndarray, n_eff: np.ndarray | float) -> np.ndarray:
    """Sampling error of each eigenvalue, ``lambda sqrt(2 / N*)`` (North et al. 1982), with each mode's
    own ``N*``."""
    return eigenvalues * np.sqrt(2.0 / np.asarray(n_eff, dtype=float))


def separated(eigenvalues: np.ndarray, errors: np.ndarray) -> np.ndarray:
    """North's rule of thumb with both modes' errors: is each mode apart from both of its neighbours?

    Two neighbouring modes ``j`` and ``k`` are apart when the gap between their
    eigenvalues exceeds the larger of their two errors,
    ``|lambda_j - lambda_k| > max(d lambda_j, d lambda_k)``: North's rule,
    applied to each mode of the pair with its own error, must hold for both.
    The first-order error North et al. (1982) give a mode's pattern,
    ``d lambda / (lambda_j - lambda_k)`` times the neighbour's pattern, then
    stays below one for both.  The pair is judged once, so mode ``k`` is never
    mixed with ``k + 1`` while ``k + 1`` is apart from ``k``.  (Asking the gap
    to exceed the sum of the errors, error bars that do not overlap, would be
    twice as strict as North's rule for equal errors.)

    Parameters
    ----------
    eigenvalues, errors
        The kept modes followed by one more: the next eigenvalue and its error
        (zero and zero when the field has no further mode).

    Returns
    -------
    One flag per kept mode (one fewer than given).
    """
    gap = eigenvalues[:-1] - eigenvalues[1:]
    apart = gap > np.maximum(errors[:-1], errors[1:])  # pair (k, k + 1)
    above = np.concatenate([[True], apart[:-1]])
    return above & apart


@dataclass
class SamplingErrors:
    """Each kept mode's effective sample size, eigenvalue error and separation (North's rule)."""

    effective_sample_size: np.ndarray
    errors: np.ndarray
    separated: np.ndarray
    how: str


def sampling_errors(eigenvalues: np.ndarray, pcs: np.ndarray, next_eigenvalue: float,
                    next_pc: np.ndarray | None, setting: int | str) -> SamplingErrors:
    """North et al. (1982) errors of the kept modes, each with the effective sample size of its own PC.

    Parameters
    ----------
    eigenvalues
        ``(mode,)`` kept eigenvalues.
    pcs
        ``(time, mode)`` their PCs.
    next_eigenvalue, next_pc
        The mode after the last kept one (its PC is ``None`` when the field has no further mode): the
        last kept mode is compared with it, with its own error.
    setting
        ``"auto"`` (the red-noise ``N*`` of each PC), or a number given by the user for every mode.
    """
    steps, count = pcs.shape
    series = pcs if next_pc is None else np.column_stack([pcs, next_pc])
    if setting == "auto":
        sizes = red_noise_sample_size(steps, lag1_autocorrelation(series))
        how = (f"each mode's own N* = N (1 - r^2) / (1 + r^2), N = {steps} time steps, r the lag-1 "
               f"autocorrelation of the mode's PC ({BRETHERTON})")
    else:
        sizes = np.full(series.shape[1], float(setting))
        how = f"given in the config (modes.effective_sample_size: {setting}) for every mode, of {steps} time steps"
    spectrum = np.append(eigenvalues, next_eigenvalue)
    errors = np.append(north_errors(spectrum[:series.shape[1]], sizes), np.zeros(count + 1 - series.shape[1]))
    return SamplingErrors(effective_sample_size=sizes[:count], errors=errors[:count],
                          separated=separated(spectrum, errors), how=how)


def correlation_maps(patterns: np.ndarray, sum_squares: np.ndarray, steps: int) -> np.ndarray:
    """Correlation of each PC with the prepared series at each point.

    The maps are regressions on standardised PCs, ``eof = A^T pc / (n - 1)``,
    so dividing by each point's standard deviation ``sqrt(sum_t a_t^2 / (n - 1))``
    gives the correlation; NaN where a point was not used or is constant.

    Parameters
    ----------
    patterns
        ``(point, mode)`` regression maps.
    sum_squares
        ``(point,)`` sum over time of each prepared (centred) series squared.
    steps
        Number of time steps ``n``.
    """
    variance = np.asarray(sum_squares, dtype=float) / (steps - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return patterns / np.where(variance > 0, np.sqrt(variance), np.nan)[:, None]


def mode_diagnostics(modes: xr.Dataset, sampling: SamplingErrors, spectrum: np.ndarray, total_variance: float,
                     unresolved: float, correlation: np.ndarray, units: str | None) -> xr.Dataset:
    """The per-mode sample sizes, the whole spectrum and the correlation maps, as CF variables.

    Parameters
    ----------
    modes
        The solver's modes (for the coordinates).
    sampling
        From :func:`sampling_errors`.
    spectrum
        Every eigenvalue resolved, kept and beyond, descending.
    total_variance
        The weighted field's total variance.
    unresolved
        Fraction of the total variance beyond ``spectrum`` (0 when every eigenvalue is there).
    correlation
        ``(mode, lat, lon)`` from :func:`correlation_maps`.
    units
        The prepared field's units (the spectrum's are their square).
    """
    rank = np.arange(1, spectrum.size + 1)
    return xr.Dataset(
        {
            "effective_sample_size": ("mode", sampling.effective_sample_size, {
                "long_name": "effective sample size of the mode's eigenvalue (North et al. 1982 errors)",
                "units": "1", "comment": sampling.how}),
            "spectrum": ("rank", spectrum, {
                "long_name": "every eigenvalue resolved, kept modes and beyond, in decreasing order",
                **({"units": f"({units})^2"} if units else {})}),
            "spectrum_explained": ("rank", spectrum / total_variance, {
                "long_name": "fraction of the weighted total variance along each eigenvalue of spectrum",
                "units": "1", "unresolved_fraction": float(unresolved),
                "comment": "unresolved_fraction: the share of the total variance beyond the last rank given"}),
            "correlation": (("mode", "lat", "lon"), correlation, {
                "long_name": "correlation of the mode's PC with the prepared anomaly at each point",
                "units": "1", "comment": "NaN where the point was not used or its prepared series is constant"}),
        },
        coords={"mode": modes["mode"], "rank": ("rank", rank, {"long_name": "rank of the eigenvalue", "units": "1"})},
    )


def unexplained_fractions(eigenvalues: np.ndarray, pcs: np.ndarray, step_squares: np.ndarray) -> np.ndarray:
    """``(time, mode)``: the fraction of each step's weighted anomaly variance that modes 1..k leave unexplained.

    With ``X = A W = U S V^T``, ``pc_k = sqrt(n - 1) U_k`` and ``lambda_k = s_k^2 / (n - 1)`` (the
    conventions of :mod:`climodes.solvers`), step ``t`` is the row ``x_t = sum_k U_tk s_k V_k`` of orthogonal
    parts, so modes 1..k hold ``sum_{j<=k} U_tj^2 s_j^2 = sum_{j<=k} lambda_j pc_j(t)^2`` of its sum of squares
    ``||x_t||^2`` (SVD algebra), and leave

        1 - sum_{j<=k} lambda_j pc_j(t)^2 / ||x_t||^2.

    It never increases with ``k``, and is 0 once every mode of the field is kept.  NaN at a step whose
    anomalies are all zero.

    Parameters
    ----------
    eigenvalues
        ``(mode,)`` eigenvalues.
    pcs
        ``(time, mode)`` standardised PCs.
    step_squares
        ``(time,)`` each step's weighted anomaly sum of squares ``||x_t||^2``.
    """
    explained = np.cumsum(eigenvalues * pcs**2, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return 1 - explained / np.where(step_squares > 0, step_squares, np.nan)[:, None]


def local_explained(correlation: np.ndarray) -> np.ndarray:
    """The fraction of each point's variance that modes 1..k explain, from the ``(mode, ...)`` correlation maps.

    The PCs are uncorrelated with unit variance, so the part of a point's prepared series along modes
    1..k, ``sum_{j<=k} pc_j eof_j(x)``, has variance ``sum_{j<=k} eof_j(x)^2``; over the point's variance
    that is ``sum_{j<=k} r_j(x)^2`` with ``r_j = eof_j / sd`` the correlation of PC ``j`` with the point.
    """
    return np.cumsum(np.square(correlation), axis=0)


def residual_variables(modes: xr.Dataset, eigenvalues: np.ndarray, pcs: np.ndarray, step_squares: np.ndarray,
                       correlation: np.ndarray, units: str | None) -> xr.Dataset:
    """The residual after modes 1..k as CF variables: ``unexplained_fraction(mode, time)`` (each step),
    ``explained_locally(mode, lat, lon)`` (each point) and ``step_variance(time)``, each step's share of the
    total variance (its weighted anomaly sum of squares over ``n - 1``).

    Parameters
    ----------
    modes
        The solver's modes (for the coordinates).
    eigenvalues, pcs
        The kept modes: ``(mode,)`` and ``(time, mode)``.
    step_squares
        ``(time,)`` each step's weighted anomaly sum of squares.
    correlation
        ``(mode, lat, lon)`` from :func:`correlation_maps`.
    units
        The prepared field's units.
    """
    time = modes["pc"].dims[1]
    return xr.Dataset(
        {
            "unexplained_fraction": (("mode", time), unexplained_fractions(eigenvalues, pcs, step_squares).T, {
                "long_name": "fraction of the step's weighted anomaly variance that modes 1 to mode leave unexplained",
                "units": "1",
                "comment": "1 - sum over modes j <= mode of eigenvalue_j * pc_j^2 / (step_variance * (n - 1)); "
                           "NaN where the step's anomalies are all zero"}),
            "explained_locally": (("mode", "lat", "lon"), local_explained(correlation), {
                "long_name": "fraction of the point's variance explained by modes 1 to mode",
                "units": "1", "comment": "sum over modes j <= mode of correlation_j^2; NaN where the point was not "
                                         "used or its prepared series is constant"}),
            "step_variance": (time, step_squares / (pcs.shape[0] - 1), {
                "long_name": "weighted anomaly sum of squares of the step over n - 1: its share of the total variance",
                **({"units": f"({units})^2"} if units else {}),
                "comment": "sums over the steps to the total variance (eigenvalue:total_variance)"}),
        },
        coords={"mode": modes["mode"]},
    )
