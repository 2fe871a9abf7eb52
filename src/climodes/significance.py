"""Which modes stand above red noise: eigenvalue spectra of surrogate fields.

In the spirit of Preisendorfer's Rule N (Preisendorfer 1988, "Principal
Component Analysis in Meteorology and Oceanography", Elsevier): a mode is worth
interpreting only if its eigenvalue is larger than noise alone would give at
its rank.  Rule N's noise is white; climate series are red, and red noise
alone makes larger leading eigenvalues, so the noise here is red:

- a surrogate field has the field's shape, its used points and its area
  weights; at each used point an AR(1) series with that point's lag-1
  autocorrelation ``r`` and variance ``s^2`` (of its prepared series, from the
  solver's first pass: no read of the data), independent from point to point;
- its eigenvalues are computed like the field's (area-weighted, centred,
  divided by ``n - 1``), chosen by size as the solvers choose: the
  cross-product of the whole surrogate over its shorter side when it is
  small, the ``time x time`` Gram
  matrix summed over blocks of latitude rows when the record has up to
  ``GRAM_MAX_STEPS`` steps, otherwise a randomized block Krylov sketch (power
  iterations, every iteration's basis kept), which draws each surrogate block
  again in each pass;
- the noise eigenvalue of rank ``k`` at level ``p`` is the
  ``ceil(p (S + 1))``-th smallest of the ``S`` surrogates' ``k``-th
  eigenvalues.  If the field were such noise, its ``k``-th eigenvalue and the
  surrogates' would be exchangeable, so it would exceed that value with
  probability at most ``1 - p`` (the Monte Carlo test's rank argument, common
  practice).  They are nearly so.  A surrogate's variance at each point
  varies by chance around the variance fitted to the data, itself a chance
  value around the true one: the variances are more uneven than the field's,
  which raises the surrogates' leading eigenvalues.  The lag-1 estimate is
  biased low (by about ``(1 + 4 r) / n``, from memory), which lowers them.
  The first wins: the test is conservative (on pure red noise in
  ``tests/test_significance.py``, about 4 % of runs pass mode 1 at level 0.9,
  where 10 % would be exact).  Scaling each surrogate series to the fitted
  variance exactly does not cure it: in red noise a series' variance and its
  slow wandering go together, and the test then passes noise twice too often;
- modes are significant from the first one on, up to the first that does not
  exceed its noise eigenvalue: the count stops there.  A run on pure noise then
  calls any mode significant only when mode 1 passes, with probability at most
  ``1 - p``, however many modes are kept.

Each surrogate latitude row is drawn from its own seed,
``numpy.random.SeedSequence(seed, spawn_key=(surrogate, row, 0))``, so the
result does not depend on the blocks, the workers or the scheduler.  The
surrogates run as dask tasks, one per surrogate, each walking over its blocks.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import dask
import numpy as np
import xarray as xr

from climodes.solvers import EXACT_MAX_VALUES, GRAM_MAX_STEPS, OVERSAMPLING

BLOCK_VALUES = 4_000_000  # float64 values of one surrogate block (32 MB)
SKETCH_PASSES = 5  # of the randomized sketch: the range, then power iterations


@dataclass(frozen=True)
class RedNoise:
    """The AR(1) model of each point: lag-1 autocorrelation, and standard deviation times area weight.

    Both ``(lat, lon)``; the scale is zero where a point is not used (or constant).
    """

    lag1: np.ndarray
    scale: np.ndarray


@dataclass
class NoiseTest:
    """The red-noise test's result per kept mode, and how it was made."""

    noise_eigenvalues: np.ndarray
    significant: np.ndarray
    level: float
    surrogates: int
    how: str


def fit_red_noise(moments: np.ndarray, weights: np.ndarray, steps: int, shape: tuple[int, int]) -> RedNoise:
    """Each point's AR(1) model from its prepared series' moments (see :func:`climodes.blocks.series_moments`).

    ``r = sum_t a_t a_{t+1} / sum_t a_t^2`` (the lag-1 estimate of
    :func:`climodes.diagnostics.lag1_autocorrelation`) and
    ``s^2 = sum_t a_t^2 / (n - 1)``.
    """
    squares, lagged = moments[:, 0], moments[:, 1]
    used = squares > 0
    lag1 = np.divide(lagged, squares, out=np.zeros_like(squares), where=used)
    scale = np.sqrt(squares / (steps - 1)) * weights
    return RedNoise(lag1.reshape(shape), np.where(used, scale, 0.0).reshape(shape))


def noise_rank(level: float, surrogates: int) -> int:
    """The order statistic (1-based) of ``surrogates`` values that a value exceeds with probability at most
    ``1 - level`` under exchangeability: ``ceil(level (S + 1))`` (common practice)."""
    return math.ceil(level * (surrogates + 1) - 1e-9)


def noise_eigenvalues(spectra: np.ndarray, level: float) -> np.ndarray:
    """The noise eigenvalue at each rank: the ``noise_rank``-th smallest of the ``(surrogate, rank)`` spectra."""
    return np.sort(spectra, axis=0)[noise_rank(level, spectra.shape[0]) - 1]


def significant_modes(eigenvalues: np.ndarray, noise: np.ndarray) -> np.ndarray:
    """Modes above their noise eigenvalue, counted from mode 1 and stopping at the first that is not.

    >>> significant_modes(np.array([9.0, 4.0, 2.0, 1.5]), np.array([3.0, 2.5, 2.1, 1.0])).tolist()
    [True, True, False, False]
    """
    return np.cumprod(eigenvalues > noise).astype(bool)


def _rng(seed: int, surrogate: int, row: int, stream: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(surrogate, row, stream)))


def surrogate_block(noise: RedNoise, rows: range, steps: int, seed: int, surrogate: int) -> np.ndarray:
    """The weighted, centred surrogate of the used points of latitude ``rows``: ``(time, point)``.

    Each row's innovations come from that row's own seed; the AR(1) series
    starts from its stationary distribution, ``z_0 = e_0``,
    ``z_t = r z_{t-1} + sqrt(1 - r^2) e_t``, then is centred and scaled by
    ``s w``.
    """
    scale = noise.scale[rows.start:rows.stop]
    used = scale > 0
    shocks = np.concatenate([_rng(seed, surrogate, row, 0).standard_normal((steps, int(used[i].sum())))
                             for i, row in enumerate(rows)], axis=1)
    lag1 = noise.lag1[rows.start:rows.stop][used]
    spread = np.sqrt(1 - lag1**2)
    for t in range(1, steps):
        shocks[t] *= spread
        shocks[t] += lag1 * shocks[t - 1]
    shocks -= shocks.mean(axis=0)
    shocks *= scale[used]
    return shocks


def _block_rows(noise: RedNoise, steps: int, rows: int | None) -> list[range]:
    nlat, nlon = noise.scale.shape
    height = rows or max(1, BLOCK_VALUES // (steps * nlon))
    return [range(start, min(start + height, nlat)) for start in range(0, nlat, height)]


def _test_matrix(noise: RedNoise, rows: range, seed: int, surrogate: int, rank: int) -> np.ndarray:
    """The sketch's random ``(point, rank)`` matrix for the used points of ``rows``, one seed per row."""
    used = noise.scale[rows.start:rows.stop] > 0
    return np.concatenate([_rng(seed, surrogate, row, 1).standard_normal((int(used[i].sum()), rank))
                           for i, row in enumerate(rows)])


def _krylov_ritz_values(krylov: np.ndarray, product: np.ndarray) -> np.ndarray:
    """Rayleigh-Ritz values of ``X X^T`` on the span of every power iteration's basis (a block Krylov
    space, Musco and Musco 2015, NeurIPS, from memory), descending: far closer to the leading eigenvalues of
    a flat noise spectrum than the last basis alone.  ``product`` is ``X X^T krylov``, from the passes made.

    The blocks are orthonormal each but not to each other: the space's own orthonormal basis comes from the
    eigenvectors of ``K^T K`` (directions it barely holds left out).
    """
    overlap, directions = np.linalg.eigh(krylov.T @ krylov)
    keep = overlap > 1e-10 * overlap.max()
    basis = directions[:, keep] / np.sqrt(overlap[keep])
    rayleigh = basis.T @ (krylov.T @ product) @ basis
    return np.linalg.eigvalsh((rayleigh + rayleigh.T) / 2)[::-1]


def surrogate_method(noise: RedNoise, steps: int) -> str:
    """How a surrogate's eigenvalues are found, by its size as the solvers choose: ``whole`` (the whole
    surrogate in memory, the cross-product over its shorter side) up to ``EXACT_MAX_VALUES``, ``gram``
    (the time x time cross-product over blocks) up to ``GRAM_MAX_STEPS`` time steps, ``sketch`` beyond."""
    if steps * int(np.sum(noise.scale > 0)) <= EXACT_MAX_VALUES:
        return "whole"
    return "gram" if steps <= GRAM_MAX_STEPS else "sketch"


def surrogate_spectrum(noise: RedNoise, steps: int, count: int, seed: int, surrogate: int,
                       rows: int | None = None, method: str | None = None) -> np.ndarray:
    """The ``count`` leading eigenvalues of one surrogate field (descending).

    Parameters
    ----------
    noise
        From :func:`fit_red_noise`.
    steps
        Time steps ``n``.
    count
        Eigenvalues wanted.
    seed, surrogate
        The run's seed and the surrogate's number.
    rows
        Latitude rows per block (the result does not depend on it).
    method
        ``whole``, ``gram`` or ``sketch``; by default :func:`surrogate_method`'s choice.
    """
    blocks = _block_rows(noise, steps, rows)
    method = method or surrogate_method(noise, steps)
    if method == "whole":
        whole = np.concatenate([surrogate_block(noise, b, steps, seed, surrogate) for b in blocks], axis=1)
        values = np.linalg.eigvalsh(whole.T @ whole if whole.shape[1] < steps else whole @ whole.T)[::-1]
    elif method == "gram":
        gram = np.zeros((steps, steps))
        for block in blocks:
            z = surrogate_block(noise, block, steps, seed, surrogate)
            gram += z @ z.T
        values = np.linalg.eigvalsh(gram)[::-1]
    else:
        rank = min(count + OVERSAMPLING, steps)
        sample = np.zeros((steps, rank))
        for block in blocks:
            sample += surrogate_block(noise, block, steps, seed, surrogate) @ _test_matrix(noise, block, seed,
                                                                                           surrogate, rank)
        bases, products = [], []
        for _ in range(SKETCH_PASSES - 1):  # power iterations: X X^T Q, the noise drawn again
            bases.append(np.linalg.qr(sample)[0])
            sample = np.zeros_like(bases[-1])
            for block in blocks:
                z = surrogate_block(noise, block, steps, seed, surrogate)
                sample += z @ (z.T @ bases[-1])
            products.append(sample)
        values = _krylov_ritz_values(np.hstack(bases), np.hstack(products))
    values = np.clip(values[:count], 0, None) / (steps - 1)
    return np.pad(values, (0, count - values.size))


def red_noise_test(eigenvalues: np.ndarray, noise: RedNoise, steps: int, surrogates: int, level: float,
                   seed: int, rows: int | None = None) -> NoiseTest:
    """Test each kept mode against ``surrogates`` red-noise fields, on the dask scheduler in use.

    Parameters
    ----------
    eigenvalues
        The field's kept eigenvalues.
    noise
        Each point's AR(1) model (:func:`fit_red_noise`).
    steps
        Time steps.
    surrogates
        Number of surrogate fields ``S``; at least ``level / (1 - level)``, so that :func:`noise_rank` is
        one of them (the config checks it).
    level
        The quantile ``p``: a mode of pure noise passes with probability at most ``1 - p``.
    seed
        Seed of the surrogates.
    rows
        Latitude rows per surrogate block (the result does not depend on it).
    """
    count = eigenvalues.size
    model = dask.delayed(noise)
    tasks = [dask.delayed(surrogate_spectrum)(model, steps, count, seed, s, rows) for s in range(surrogates)]
    spectra = np.array(dask.compute(*tasks))
    threshold = noise_eigenvalues(spectra, level)
    method = {"whole": "cross-product of the whole surrogate", "gram": "time x time Gram matrix",
              "sketch": f"randomized sketch, {SKETCH_PASSES} passes"}[surrogate_method(noise, steps)]
    how = (f"{surrogates} red-noise surrogate fields (AR(1) per point with its own lag-1 autocorrelation and "
           f"variance, the same points and weights; seed {seed}; eigenvalues from the {method}); noise eigenvalue: "
           f"the {noise_rank(level, surrogates)}-th smallest of the {surrogates} at each rank (level {level:g}); "
           "significant: modes 1, 2, ... above it, up to the first that is not")
    return NoiseTest(threshold, significant_modes(eigenvalues, threshold), level, surrogates, how)


def noise_variables(test: NoiseTest, mode: xr.DataArray, units: str | None) -> xr.Dataset:
    """``noise_eigenvalue(mode)`` and ``significant(mode)`` as CF variables.

    Parameters
    ----------
    test
        From :func:`red_noise_test`.
    mode
        The results' mode coordinate.
    units
        The prepared field's units (the eigenvalues' are their square).
    """
    return xr.Dataset(
        {
            "noise_eigenvalue": ("mode", test.noise_eigenvalues, {
                "long_name": f"eigenvalue of red-noise surrogate fields at the same rank, at level {test.level:g}",
                **({"units": f"({units})^2"} if units else {}),
                "level": test.level, "surrogates": np.int32(test.surrogates), "comment": test.how}),
            "significant": ("mode", test.significant.astype(np.int8), {
                "long_name": "mode above red noise: its eigenvalue and those of every mode before it exceed "
                             "noise_eigenvalue",
                "flag_values": np.array([0, 1], dtype=np.int8),
                "flag_meanings": "not_above_red_noise above_red_noise"}),
        },
        coords={"mode": mode},
    )
