"""What the modes can be trusted for: sampling errors, separability, reconstruction.

North et al. (1982), "Sampling errors in the estimation of empirical
orthogonal functions", Mon. Wea. Rev. 110, 699-706: an eigenvalue estimated
from ``N`` independent samples has a standard error of about
``lambda * sqrt(2 / N)``, and a mode whose error is as large as the gap to a
neighbouring eigenvalue is mixed with that neighbour ("North's rule of thumb").

Consecutive steps of a climate series are not independent.  With
``effective_sample_size: auto`` the ``N`` used is the red-noise effective
sample size for variances, ``N (1 - r^2) / (1 + r^2)``, where ``r`` is the
lag-1 autocorrelation (Bretherton et al. 1999, J. Climate 12, 1990-2009;
formula quoted from memory), with ``r`` the mean lag-1 autocorrelation of the
retained PCs, floored at zero.
"""

from __future__ import annotations

import numpy as np
import xarray as xr


def lag1_autocorrelation(series: np.ndarray) -> np.ndarray:
    """Lag-1 autocorrelation of each column of ``series`` (time, k)."""
    x = series - series.mean(axis=0)
    return np.sum(x[1:] * x[:-1], axis=0) / np.sum(x * x, axis=0)


def effective_sample_size(pcs: np.ndarray, setting: int | str) -> tuple[float, str]:
    """The sample size for North's errors and a sentence saying how it was found.

    Parameters
    ----------
    pcs
        ``(time, mode)`` principal components.
    setting
        ``"auto"`` for the red-noise estimate, or a number given by the user.
    """
    n = pcs.shape[0]
    if setting != "auto":
        return float(setting), f"given in the config (modes.effective_sample_size: {setting}) for {n} time steps"
    r = float(max(np.mean(lag1_autocorrelation(pcs)), 0.0))
    n_eff = max(n * (1 - r**2) / (1 + r**2), 2.0)
    return n_eff, (f"N (1 - r^2) / (1 + r^2) with N = {n} time steps and r = {r:.3f}, the mean lag-1 "
                   "autocorrelation of the retained PCs (Bretherton et al. 1999)")


def north_errors(eigenvalues: np.ndarray, n_eff: float) -> np.ndarray:
    """Sampling error of each eigenvalue, ``lambda sqrt(2 / N*)`` (North et al. 1982)."""
    return eigenvalues * np.sqrt(2.0 / n_eff)


def separated(eigenvalues: np.ndarray, errors: np.ndarray, next_eigenvalue: float) -> np.ndarray:
    """North's rule of thumb: is each mode's eigenvalue farther from both neighbours than its error?

    ``next_eigenvalue`` is the eigenvalue after the last retained one (zero if none).
    """
    spectrum = np.concatenate([[np.inf], eigenvalues, [next_eigenvalue]])
    gap = np.minimum(spectrum[:-2] - spectrum[1:-1], spectrum[1:-1] - spectrum[2:])
    return gap > errors


def reconstruct(modes: xr.Dataset, which: list[int] | None = None) -> xr.DataArray:
    """The anomaly field rebuilt from modes: ``sum_k pc_k(t) eof_k(x)``.

    Parameters
    ----------
    modes
        A results dataset with ``pc`` and ``eof``.
    which
        Mode numbers to use (1-based); all by default.
    """
    chosen = modes if which is None else modes.sel(mode=which)
    return xr.dot(chosen["pc"], chosen["eof"], dim="mode")
