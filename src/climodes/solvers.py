"""The decompositions: weighted anomalies in, eigenvalues, PCs and EOF maps out.

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

Three solvers, one result:

- ``exact``: LAPACK SVD (gesdd) of the whole matrix in memory, for small problems.
- ``gram``: the (time x time) cross-product ``X X^T`` summed block by block
  over grid points in float64 (added in place, one sum held), eigendecomposed, then the maps in a
  second pass: two passes over the data, memory ``O(n^2 + a block)``.
- ``randomized``: a randomized range finder with oversampling and power
  iterations (Halko, Martinsson and Tropp 2011, SIAM Review 53(2), 217-288,
  algorithms 4.4 and 5.1, numbers from memory), for both dimensions large:
  two passes when the kept modes have converged after the first power
  iteration, at most ``2 + POWER_ITERATIONS``.  The random test matrix is drawn
  once over the whole grid from the seed, so the result does not depend on the
  blocks.

The streaming solvers see the field as blocks of ``(all time steps, some
latitude rows)``, in which the missing-data rule, centring and weighting are
local; blocks are read as the dask graph runs and never gathered.  The prepare
steps along time (anomalies, trend) arrive as :class:`~climodes.prepare.TimeSteps`
still to be applied: on complete series the streaming solvers apply them to
their small products instead of to every block (see :mod:`climodes.blocks`).
"""

from __future__ import annotations

import contextlib
import math
from dataclasses import dataclass, field
from typing import Callable, ContextManager

import dask
import numpy as np
import xarray as xr
from threadpoolctl import threadpool_limits

from climodes.blocks import (
    chained_sum,
    field_blocks,
    series_moments,
    flat,
    full_path,
    gram_part,
    joined,
    path_points,
    power_part,
    quietly,
    range_part,
    regression_part,
    row_slices,
    step_squares,
    symmetric,
    time_operator,
    time_operator_transposed,
    tree_sum,
)
from climodes.config import size_text
from climodes.errors import UserError
from climodes.grid import grid_coordinates
from climodes.prepare import PERIOD, Fitted, TimeSteps, fitted_variables, time_bounds
from climodes.weights import point_status, usable_points

OVERSAMPLING = 10
POWER_ITERATIONS = 3  # at most; the randomized solver stops earlier once converged
RITZ_TOLERANCE = 1e-4  # residual of a kept mode, relative to its eigenvalue (see _converged)
NULL_TOLERANCE = 1e-13  # an eigenvalue below this fraction of the leading one is null (see _drop_null_modes)
EXACT_MAX_VALUES = 5_000_000  # time steps x points up to which the exact solver is chosen
# bytes a value of the field costs the exact solver: its float64 copies as prepared and weighted, the SVD's
# copy, factors and workspace, the diagnostics after it (measured, peak resident memory beyond what the
# process held before reading: 71 and 79 bytes a value for 730 and 365 steps x 7200 points)
EXACT_BYTES_PER_VALUE = 80
GRAM_MAX_STEPS = 2_000  # the Gram product costs steps^2 x points: beyond this, randomized passes are cheaper
BLOCK_MAX_BYTES = 128e6  # float32 bytes of one block as read
LIBRARY_WORK = 100e6  # bytes kept beside every plan for what the libraries allocate while a run reads and writes
BLOCKS_PER_WORKER = 4  # at least, where the grid has the rows: keeps the workers evenly busy
# bytes in flight per value of a block (read pieces, joined block, working copies), measured with make bench:
# the gram solver works in float64, the randomized one in the field's precision (here float32; twice for float64)
BYTES_PER_BLOCK_VALUE = {"gram": 28, "randomized": 16}


@dataclass
class Decomposition:
    """Leading modes of a centred ``(time, point)`` anomaly matrix.

    ``spectrum`` holds every eigenvalue resolved, kept and beyond (all of them for the exact and Gram
    solvers), and ``unresolved_fraction`` the share of the total variance beyond them; ``next_pc`` is
    the PC of the mode after the last kept one (``None`` when there is none); ``point_moments`` is
    ``(point, 2)``: each prepared series' sum of squares and sum of lag-1 products (see
    :func:`climodes.blocks.series_moments`), zero at unused points (whose prepared series are zero);
    ``step_squares`` is ``(time,)``: each step's weighted anomaly sum of squares ``||x_t||^2`` (the row sums
    of ``X * X``, whose total is ``total_variance`` times ``n - 1``).
    """

    eigenvalues: np.ndarray
    pcs: np.ndarray
    patterns: np.ndarray
    total_variance: float
    next_eigenvalue: float
    method: str
    notes: list[str] = field(default_factory=list)
    spectrum: np.ndarray | None = None
    unresolved_fraction: float = 0.0
    next_pc: np.ndarray | None = None
    point_moments: np.ndarray | None = None
    step_squares: np.ndarray | None = None


@dataclass
class PointCounts:
    """How the missing-data rule treated the grid points."""

    grid: int
    used: int
    always_missing: int
    too_often_missing: int
    filled_values: int
    notes: list[str] = field(default_factory=list)


@dataclass(frozen=True)
class SolverPlan:
    """Which solver runs, why, (for the streaming ones) how many latitude rows a block holds, and the memory
    in bytes the run needs with it, what it holds already included (what ``climodes submit`` asks for)."""

    method: str
    reason: str
    lat_rows: int | None = None
    memory: int = 0


def working_precision(dtype: np.dtype) -> np.dtype:
    """The randomized solver's working precision for a field of ``dtype``: float32 fields stay float32, wider
    ones are worked on in their own."""
    return np.result_type(dtype, np.float32)


def plan_solver(shape: tuple[int, int, int], count: int, method: str, budget: int, workers: int,
                in_use: int = 0, fitted_per_point: int = 1,
                read_cache: Callable[[int], int] = lambda rows: 0, itemsize: int = 4) -> SolverPlan:
    """Choose the solver for a ``(time, lat, lon)`` field and a memory budget in bytes.

    ``auto`` takes ``exact`` for small matrices that fit, ``gram`` while the
    time x time matrix is small, and ``randomized`` beyond.  ``in_use`` is what
    the process holds already (the interpreter and its libraries, about 0.15 GB):
    the budget is for the whole process, so that much is not there to plan with.
    ``fitted_per_point`` is how many values the preparation fits at each point
    (:attr:`climodes.prepare.TimeSteps.values_per_point`: 367 for a daily
    climatology), kept with the results.  ``read_cache`` gives the bytes the readers of the files keep
    (their chunk caches: see :func:`climodes.storage.cache_held`) while the passes read blocks of so many
    latitude rows.  ``itemsize`` is that of the randomized solver's working precision for the prepared field
    (see :func:`working_precision`).
    """
    steps, nlat, nlon = shape
    points = nlat * nlon
    budget_given, budget = budget, budget - in_use
    # the maps, as solved, signed and written; the fitted preparation, held from the first pass on (in the
    # working precision: the field's own for the randomized solver)
    results_bytes = 3 * points * count * 8 + points * fitted_per_point * (itemsize if method == "randomized" else 8)
    exact_bytes = EXACT_BYTES_PER_VALUE * steps * points + read_cache(nlat) + LIBRARY_WORK
    held = workers + 3 + int(np.ceil(np.log2(max(nlat, 2))))  # partial sums alive in the pairwise tree, at most
    # time x time matrices: the chain's sum, each worker's block product, and the eigendecomposition's copy
    # and vectors (see climodes.blocks.chained_sum)
    gram_bytes = (workers + 3) * steps * steps * 8 + results_bytes
    rank = min(count + OVERSAMPLING, steps, points)
    randomized_bytes = 3 * points * rank * 8 + 2 * held * steps * rank * 8 + results_bytes
    shape_text = f"{steps} steps x {points} points ({size_text(steps * points * itemsize)} as float{8 * itemsize})"

    def streaming(chosen: str, why: str) -> SolverPlan:
        fixed = gram_bytes if chosen == "gram" else randomized_bytes
        per_value = BYTES_PER_BLOCK_VALUE[chosen] * (itemsize / 4 if chosen == "randomized" else 1)
        solver = f"the {chosen} solver" + (" (modes.method auto's choice)" if method == "auto" else "")
        rows, need = block_size(nlat, steps * nlon, fixed, per_value, budget_given, in_use,
                                workers, f"{solver} on {shape_text}", read_cache)
        why += f"; {-(-nlat // rows)} block(s) of {rows} latitude rows within compute.memory {size_text(budget_given)}"
        if chosen == "gram":  # and enough that auto, planning again with only this much, still takes gram
            need = max(need, 2 * gram_bytes)
        return SolverPlan(chosen, why, rows, int(np.ceil(in_use + need)))

    if method == "exact" or (method == "auto" and steps * points <= EXACT_MAX_VALUES and exact_bytes <= budget):
        if exact_bytes > budget:
            raise UserError(f"modes.method: exact needs about {size_text(exact_bytes + in_use)} for {shape_text}, more "
                            f"than compute.memory ({size_text(budget_given)}); use method auto or gram, or raise "
                            "compute.memory")
        why = "; chosen in the config (modes.method)" if method == "exact" else " is small: the whole matrix fits in memory"
        return SolverPlan("exact", shape_text + why, memory=int(in_use + exact_bytes))
    if method != "auto":
        return streaming(method, f"{shape_text}; chosen in the config (modes.method)")
    if steps > GRAM_MAX_STEPS:
        return streaming("randomized", f"{shape_text} is large in both dimensions")
    if gram_bytes <= budget / 2:
        with contextlib.suppress(UserError):  # no room for the Gram solver's blocks beside its matrices
            return streaming("gram", f"{shape_text}; its {steps} x {steps} Gram matrix ({size_text(steps**2 * 8)}) is small")
    return streaming("randomized", f"{shape_text}; the Gram solver's {steps} x {steps} matrices, maps and blocks "
                                   "take more room than compute.memory leaves")


def block_size(units: int, unit_values: int, fixed: float, bytes_per_value: float, budget: int, in_use: int,
               workers: int, what: str, held: Callable[[int], int] = lambda size: 0,
               at_least: int = 1) -> tuple[int, float]:
    """How many of ``units`` (latitude rows, time steps) of ``unit_values`` values each one block may hold.

    ``workers`` blocks are in flight at once, each costing ``bytes_per_value`` a value (the values read and
    their working copies), beside ``fixed`` bytes held for the whole work, ``held(size)`` bytes held while
    blocks of ``size`` units are read (the readers' chunk caches) and the ``in_use`` the process holds
    already, all within 70 % of ``budget`` less :data:`LIBRARY_WORK` (the rest for what the libraries
    allocate beside: measured, runs near their smallest budget went 10-110 MB past it without that).  A
    block reads at most :data:`BLOCK_MAX_BYTES` of float32, and each worker gets :data:`BLOCKS_PER_WORKER`
    blocks where there are that many units, but holds ``at_least`` units where the budget has room for
    them (a whole chunk of the files).  Returns the units a block holds and the bytes the work needs
    beside ``in_use``.

    Raises
    ------
    UserError
        If not even one unit a worker fits the budget (``what`` says what was planned).
    """
    room = 0.7 * (budget - in_use - LIBRARY_WORK) - fixed
    per_unit = workers * bytes_per_value * unit_values
    if room < per_unit + held(1):
        need = in_use + LIBRARY_WORK + (fixed + per_unit + held(1)) / 0.7
        step = 1e7 if need >= 1e8 else 1e6  # rounded up to what size_text shows, so the advice is enough
        raise UserError(f"compute.memory: {size_text(budget)} is too small for {what}; give at least "
                        f"{size_text(math.ceil(need / step) * step)} (the process holds {size_text(in_use)} before it reads)")
    most = min(BLOCK_MAX_BYTES // (4 * unit_values), units // (BLOCKS_PER_WORKER * workers))
    size = max(1, int(min(room // per_unit, max(most, at_least))))
    while size > 1 and per_unit * size + held(size) > room:
        size -= 1
    return size, LIBRARY_WORK + (fixed + per_unit * size + held(size)) / 0.7


# --- the solvers


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
    u, s, _ = np.linalg.svd(weighted, full_matrices=False)  # LAPACK gesdd
    spectrum = s[:min(n, s.size)] ** 2 / n  # a centred matrix has rank n at most
    pcs = u[:, :count] * np.sqrt(n)
    squares = step_squares(anomaly, weights)
    return Decomposition(
        eigenvalues=spectrum[:count],
        pcs=pcs,
        patterns=anomaly.T @ pcs / n,
        total_variance=float(squares.sum() / n),
        step_squares=squares,
        next_eigenvalue=float(spectrum[count]) if spectrum.size > count else 0.0,
        method="exact: LAPACK gesdd SVD of the in-memory weighted (time x point) matrix",
        spectrum=spectrum,
        next_pc=u[:, count] * np.sqrt(n) if spectrum.size > count else None,
        point_moments=series_moments(anomaly),
    )


def _exact(field, weights, count, max_missing, progress, steps):
    with progress("reading the field (1 pass)"):
        values = quietly(lambda: field.values)()
    _refuse_infinities(bool(np.isinf(values).any()))
    block, fraction, fitted = quietly(full_path)(flat(values), np.ones(weights.size, dtype=bool), steps,
                                                 max_missing, np.float64)
    _check_points(fraction, max_missing, count)
    keep = usable_points(fraction, max_missing)
    result = exact_modes(block[:, keep], weights[keep], count)
    patterns = np.full((keep.size, result.patterns.shape[1]), np.nan)
    patterns[keep] = result.patterns
    result.patterns = patterns
    result.point_moments = series_moments(block)  # zero at the unused points
    return result, fraction, fitted


def _gram_spectrum(gram: np.ndarray, values: np.ndarray, rank: int) -> np.ndarray:
    """Every eigenvalue of the Gram matrix (descending, floored at 0), its first ``rank`` ones: the
    leading ``values`` already found, the rest from LAPACK's eigenvalues-only path when not all were."""
    if values.size < gram.shape[0]:
        values = np.clip(np.linalg.eigvalsh(gram)[::-1], 0, None)
    return values[:rank]


def _leading_eigenpairs(matrix: np.ndarray, wanted: int) -> tuple[np.ndarray, np.ndarray]:
    """Eigenvalues (descending, floored at 0) and the ``wanted`` leading eigenvectors of a symmetric matrix.

    Up to 2000 rows numpy's full ``eigh`` is quick, and every eigenvalue comes back; beyond, LAPACK's
    ``syevr`` for just the ``wanted`` pairs (through scipy) saves most of the cost.  The full ``eigh`` runs
    on one BLAS thread: at these sizes a second one gains little on an idle machine, and where the cores
    are busy (a shared node) OpenBLAS's threads wait on each other: measured 2-5x slower, 0.08 s against
    0.2-0.7 s for 720 rows.
    """
    if matrix.shape[0] <= 2000:
        with threadpool_limits(1, user_api="blas"):
            values, vectors = np.linalg.eigh(matrix)
        vectors = vectors[:, -wanted:]  # every eigenvalue is kept: the spectrum
    else:
        import scipy.linalg

        last = matrix.shape[0] - 1
        values, vectors = scipy.linalg.eigh(matrix, subset_by_index=[last + 1 - wanted, last], driver="evr",
                                            check_finite=False)
    return np.clip(values[::-1], 0, None), vectors[:, ::-1]


def _gram(field, weights, count, max_missing, progress, steps):
    n = field.sizes["time"] - 1
    blocks, rows = field_blocks(field), row_slices(field)
    parts = [dask.delayed(quietly(gram_part))(b, weights[r], max_missing, steps) for b, r in zip(blocks, rows)]
    with progress("pass 1 of 2: time x time cross-products"):
        gram, pieces = dask.compute(chained_sum(parts))[0]
    gram = symmetric(gram)
    fraction, fitted, moments = joined(pieces)
    _refuse_infinities(not np.isfinite(gram).all())
    _check_points(fraction, max_missing, count)
    cheap, gappy = path_points(fraction, max_missing, steps)
    values, vectors = _leading_eigenpairs(gram, min(count + 1, n + 1))  # + 1: the next one, for North's rule
    pcs = vectors[:, :count] * np.sqrt(n)
    pcs_t = time_operator_transposed(steps, pcs) if cheap.any() else pcs
    with progress("pass 2 of 2: EOF maps"):
        maps = dask.compute(*[dask.delayed(quietly(regression_part))(b, max_missing, cheap[r], gappy[r], pcs,
                                                                      pcs_t, steps)
                              for b, r in zip(blocks, rows)])
    result = Decomposition(
        eigenvalues=values[:count] / n,
        pcs=pcs,
        patterns=np.concatenate(maps) / n,
        total_variance=float(np.trace(gram)) / n,
        next_eigenvalue=float(values[count] / n) if values.size > count else 0.0,
        method="gram: eigendecomposition of the float64 time x time cross-product, streamed over grid blocks",
        spectrum=_gram_spectrum(gram, values, min(n, int(np.sum(usable_points(fraction, max_missing))))) / n,
        next_pc=vectors[:, count] * np.sqrt(n) if vectors.shape[1] > count else None,
        point_moments=moments,
        step_squares=np.diag(gram).copy(),  # (X X^T)_tt = ||x_t||^2
    )
    return result, fraction, fitted


def _randomized(field, weights, count, max_missing, progress, seed, steps):
    """Randomized range finder, then power iterations until the kept modes have converged.

    Each pass after the first does two things with the current orthonormal basis ``Q``: it projects the
    unweighted anomaly on it (``A^T Q``, which gives the maps), and multiplies by ``X X^T`` (the next power
    iteration).  The Rayleigh-Ritz pairs of ``Q`` and their residuals ``||X X^T u - lambda u||`` come from
    that product at no extra pass, so the iterations stop as soon as every kept mode has converged (see
    :func:`_converged`): two passes for a field with clearly dominant modes,
    at most ``2 + POWER_ITERATIONS``.
    """
    n = field.sizes["time"] - 1
    blocks, rows = field_blocks(field), row_slices(field)
    rank = min(count + OVERSAMPLING, n + 1, weights.size)
    work = working_precision(field.dtype)
    omega = np.random.default_rng(seed).standard_normal((weights.size, rank)).astype(work)
    most = 2 + POWER_ITERATIONS
    parts = [dask.delayed(quietly(range_part))(b, weights[r], max_missing, omega[r], steps)
             for b, r in zip(blocks, rows)]
    with progress(f"pass 1 of at most {most}: random projection"):
        sample, squares, pieces = dask.compute(tree_sum(parts))[0]
    total = float(squares.sum())
    fraction, fitted, moments = joined(pieces)
    _refuse_infinities(not (np.isfinite(sample).all() and np.isfinite(total)))
    _check_points(fraction, max_missing, count)
    cheap, gappy = path_points(fraction, max_missing, steps)
    for done in range(2, most + 1):
        basis = np.linalg.qr(sample)[0]
        basis_t = (time_operator_transposed(steps, basis) if cheap.any() else basis).astype(work)
        parts = [dask.delayed(quietly(power_part))(b, weights[r], max_missing, cheap[r], gappy[r],
                                                    basis.astype(work), basis_t, steps)
                 for b, r in zip(blocks, rows)]
        with progress(f"pass {done} of at most {most}: projection and power iteration"):
            read_product, full_product, projected = dask.compute(tree_sum(parts))[0]
        sample = full_product + (time_operator(steps, read_product) if cheap.any() else 0)
        ritz, vectors = np.linalg.eigh(basis.T @ sample)  # Q^T X X^T Q: the Rayleigh-Ritz matrix
        ritz, vectors = np.clip(ritz[::-1], 0, None), vectors[:, ::-1]
        kept = vectors[:, :count]
        residuals = np.linalg.norm(sample @ vectors - basis @ vectors * ritz, axis=0)
        residual = residuals[:count]
        if _converged(ritz, residual, n + 1):
            how = f"converged in {done} passes"
            break
    else:
        how = f"not converged to its tolerance in {done} passes"
    # the spectrum: the kept Ritz values, then those beyond whose residual (a bound on the distance to an
    # eigenvalue) is within the tolerance of the leading eigenvalue, up to the first that is not
    resolved = count + int(np.argmin(np.append(residuals[count:] <= RITZ_TOLERANCE * ritz[0], False)))
    result = Decomposition(
        eigenvalues=ritz[:count] / n,
        pcs=basis @ kept * np.sqrt(n),
        patterns=np.concatenate(projected) @ kept / np.sqrt(n),
        total_variance=total / n,
        next_eigenvalue=float(ritz[count] / n) if ritz.size > count else 0.0,
        spectrum=ritz[:resolved] / n,
        unresolved_fraction=max(0.0, 1 - float(np.sum(ritz[:resolved])) / total),
        next_pc=basis @ vectors[:, count] * np.sqrt(n) if ritz.size > count else None,
        point_moments=moments,
        step_squares=squares,
        method=(f"randomized: range finder with {OVERSAMPLING} extra vectors (Halko et al. 2011), seed {seed}, "
                f"streamed over grid blocks; {how}"),
    )
    if how.startswith("not"):
        result.notes.append(f"the randomized solver stopped after {done} passes with a Ritz residual up to "
                            f"{residual.max() / ritz[0]:.1e} of the first eigenvalue, above its tolerance; "
                            "the weaker modes may be off by more than 1e-4: use modes.method gram or exact")
    return result, fraction, fitted


def _converged(ritz: np.ndarray, residual: np.ndarray, steps: int) -> bool:
    """Whether the kept Ritz pairs (``residual`` long) are accurate enough to stop the power iterations.

    A mode whose eigenvalue stands apart from its neighbours by more than the sampling error
    ``lambda sqrt(2 / n)`` (North et al. 1982, with every step counted independent: the smallest error)
    needs a residual below ``RITZ_TOLERANCE`` times its own eigenvalue, so its map and PC are accurate
    to about that, relative, however much weaker than the first mode it is.  A mode inside that error of
    a neighbour has no map of its own to resolve (the sampling mixes them); it needs a residual below
    ``RITZ_TOLERANCE`` times the leading eigenvalue, which bounds the error of its eigenvalue.
    """
    kept = residual.size
    gaps = np.full(kept, np.inf)
    gaps[1:] = ritz[:kept - 1] - ritz[1:kept]
    gaps[:-1] = np.minimum(gaps[:-1], ritz[:kept - 1] - ritz[1:kept])
    if ritz.size > kept:
        gaps[-1] = min(gaps[-1], ritz[kept - 1] - ritz[kept])
    apart = gaps > ritz[:kept] * np.sqrt(2 / steps)
    limit = RITZ_TOLERANCE * np.where(apart, ritz[:kept], ritz[0])
    return bool(np.all(residual <= limit))


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
        ``(point, mode)`` EOF maps; NaN at unused points.
    lat, lon
        ``(point,)`` coordinates of the points.
    """
    signs = np.ones(patterns.shape[1])
    for k in range(patterns.shape[1]):
        size = np.nan_to_num(np.abs(patterns[:, k]), nan=-1.0)
        near_top = np.flatnonzero(size >= size.max() * (1 - 1e-6))
        first = near_top[np.lexsort((lon[near_top] % 360, lat[near_top]))[0]]
        signs[k] = 1.0 if patterns[first, k] >= 0 else -1.0
    return signs


def _drop_null_modes(result: Decomposition, count: int) -> None:
    """Keep only the modes whose eigenvalue exceeds ``NULL_TOLERANCE`` times the leading one; say so if any go.

    A field of rank ``r`` (fewer independent maps or time steps than modes asked for, or the steps
    the anomalies and trend take away) has ``r`` non-zero eigenvalues; beyond them every solver
    returns rounding noise of its own arithmetic, whose "PCs" are neither unit variance nor meaningful.
    That noise is far below the tolerance: near 1e-30 of the leading eigenvalue with float64 products,
    and about (float32 epsilon)^2 = 4e-15 with the randomized solver's float32 ones.  Real modes can be
    weak (a field of baseline anomalies and a trend holds one at 6e-9 of the leading eigenvalue) and
    are kept; the rounding of values stored in float32 is data, and its weak modes are kept too (North's
    rule marks them as not separated).
    """
    kept = int(np.sum(result.eigenvalues > NULL_TOLERANCE * result.eigenvalues[0]))
    if kept == result.eigenvalues.size:
        return
    result.notes.append(f"modes.count asks for {count} modes, but the prepared field has only {kept} that are not "
                        f"null (eigenvalue {kept + 1} is below {NULL_TOLERANCE:g} of the first): {kept} modes kept")
    result.eigenvalues = result.eigenvalues[:kept]
    result.pcs = result.pcs[:, :kept]
    result.patterns = result.patterns[:, :kept]
    result.next_eigenvalue = 0.0


def _refuse_infinities(found: bool) -> None:
    """Stop if the first pass met infinite values (its sums are then not finite): NaN is missing data,
    an infinity is not."""
    if found:
        raise UserError("input.variable: the field holds infinite (or overflowing) values, which are not missing "
                        "data; mark them missing in the files (_FillValue or missing_value) or fix them")


def _check_points(fraction: np.ndarray, max_missing: float, count: int) -> None:
    """Stop before any more work if too few points have data."""
    keep = usable_points(fraction, max_missing)
    if not keep.any():
        raise UserError("select: no grid point has enough data "
                        f"({np.sum(fraction == 1)} missing at every step, {np.sum((fraction < 1) & ~keep)} at more "
                        f"than prepare.max_missing={max_missing:g} of the steps); widen the region or raise max_missing")
    if keep.sum() < count:
        raise UserError(f"modes.count: {count} modes asked for, but only {keep.sum()} grid points have data; "
                        "lower modes.count or widen the region")


def _counts(fraction: np.ndarray, max_missing: float, steps: int) -> PointCounts:
    keep = usable_points(fraction, max_missing)
    steps_missing = fraction[keep]
    counts = PointCounts(
        grid=fraction.size,
        used=int(keep.sum()),
        always_missing=int(np.sum(fraction == 1)),
        too_often_missing=int(np.sum((fraction < 1) & ~keep)),
        filled_values=int(round(float(np.sum(steps_missing)) * steps)),
    )
    if counts.too_often_missing:
        counts.notes.append(f"dropped {counts.too_often_missing} points missing at more than "
                            f"{max_missing:.0%} of the steps")
    gappy = int(np.sum(steps_missing > 0))
    if gappy:
        counts.notes.append(f"set {counts.filled_values} missing values at {gappy} points to zero anomaly")
    return counts


def solve(field: xr.DataArray, weights: xr.DataArray, count: int, max_missing: float,
          plan: SolverPlan = SolverPlan("exact", "default"), seed: int = 0,
          progress: Callable[[str], ContextManager] | None = None,
          steps: TimeSteps = TimeSteps()) -> tuple[xr.Dataset, Decomposition, PointCounts]:
    """Decompose a ``(time, lat, lon)`` field into its ``count`` leading modes.

    Parameters
    ----------
    field
        The field, lazy, before ``steps``; for a streaming plan, chunked in latitude rows.
    weights
        ``(lat, lon)`` square-root area weights.
    count
        Number of modes.
    max_missing
        The missing-data rule's limit (see :func:`climodes.weights.usable_points`).
    plan
        From :func:`plan_solver`.
    seed
        Seed of the randomized solver.
    progress
        Called with a label around each pass over the data (a progress bar, thread limits).
    steps
        The prepare steps along time still to apply (:func:`climodes.prepare.time_steps`); none
        when ``field`` holds the anomalies already.

    Returns
    -------
    modes, decomposition, counts
        ``modes`` holds ``eof(mode, lat, lon)`` (NaN at unused points),
        ``pc(mode, time)``, ``eigenvalue(mode)`` and ``variance_explained(mode)`` (fewer than ``count``
        modes when the field has fewer that are not null: see :func:`_drop_null_modes`, and the note); the
        preparation fitted at each point in the first pass (:func:`climodes.prepare.fitted_variables`, NaN
        at unused points), ``area_weight(lat, lon)`` (``weights``), ``point_status(lat, lon)`` and, for
        seasonal or annual means, ``time_bnds``.
    """
    progress = progress or (lambda label: contextlib.nullcontext())
    w = np.asarray(weights.values, dtype=np.float64).reshape(-1)
    if plan.method != "exact" and field.chunks is None:
        field = field.chunk({"lat": plan.lat_rows or -1})
    if plan.method == "exact":
        result, fraction, fitted = _exact(field, w, count, max_missing, progress, steps)
    elif plan.method == "gram":
        result, fraction, fitted = _gram(field, w, count, max_missing, progress, steps)
    else:
        result, fraction, fitted = _randomized(field, w, count, max_missing, progress, seed, steps)
    counts = _counts(fraction, max_missing, field.sizes["time"])
    if result.total_variance == 0 or result.eigenvalues[0] <= 1e-12 * max(result.total_variance, 1e-300):
        raise UserError("input.variable: the prepared field is constant in time at every point, "
                        "so it has no modes; check the variable and prepare settings")
    _drop_null_modes(result, count)
    kept = result.eigenvalues.size
    lat2d, lon2d = (c.reshape(-1) for c in grid_coordinates(field))
    signs = sign_rule(result.patterns, lat2d, lon2d)
    result.pcs *= signs
    result.patterns *= signs

    grid = (field.sizes["lat"], field.sizes["lon"])
    used = usable_points(fraction, max_missing)
    for values in fitted.values():  # the preparation of the points the modes were computed from
        values[..., ~used] = np.nan
    fitted = Fitted(steps.preparation, {name: values.reshape(values.shape[:-1] + grid) for name, values in fitted.items()})
    modes = xr.Dataset(
        {
            "eof": (("mode", "lat", "lon"), result.patterns.T.reshape((kept, *grid))),
            "pc": (("mode", "time"), result.pcs.T),
            "eigenvalue": ("mode", result.eigenvalues),
            "variance_explained": ("mode", result.eigenvalues / result.total_variance),
            **fitted_variables(fitted, field.attrs.get("units")),
            "area_weight": (("lat", "lon"), w.reshape(grid),
                            {"long_name": "square root of the area weight each anomaly was multiplied by",
                             "units": "1"}),
            "point_status": (("lat", "lon"), point_status(fraction, max_missing).reshape(grid),
                             {"long_name": "how the missing-data rule treated the grid point",
                              "flag_values": np.array([0, 1, 2], dtype=np.int8),
                              "flag_meanings": "no_data dropped_for_missing_data used"}),
        },
        coords={"mode": np.arange(1, kept + 1), **time_bounds(field),
                **{name: coord.variable for name, coord in field.coords.items() if name not in ("cell_area", *PERIOD)}},
    )
    return modes, result, counts
