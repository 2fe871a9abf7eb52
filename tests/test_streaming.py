"""The streaming solvers: the same modes as the exact one, whatever the blocks, workers or
scheduler, within a memory plan, and in as few reads as the algorithm needs.

References: the exact LAPACK SVD (checked against eofs and scikit-learn in test_solvers.py) and
Halko, Martinsson and Tropp (2011, SIAM Review 53(2)) for what a randomized range finder with power
iterations achieves on a matrix with a decaying spectrum.
"""

import platform
import re

import dask
import numpy as np
import pytest
import xarray as xr

from climodes.config import PrepareSection
from climodes.errors import UserError
from climodes.prepare import time_steps
from climodes.blocks import time_operator, time_operator_transposed
from climodes.solvers import POWER_ITERATIONS, SolverPlan, plan_solver, solve, working_precision
from climodes.weights import area_weights
from conftest import field_dataset, red_field, write_config

K = 3


@pytest.fixture(scope="module")
def field():
    lat = np.linspace(-80, 80, 33)
    lon = np.arange(0, 360, 7.5)
    values = red_field((150, lat.size, lon.size), 21).astype(np.float32)  # float32, as archives store it
    values[:, 10:14, 5:12] = np.nan  # land
    values[::9, 20, 30] = np.nan  # a gappy point, filled
    values[::3, 22, 31] = np.nan  # too gappy: dropped
    return xr.DataArray(values, dims=("time", "lat", "lon"),
                        coords={"time": np.arange(150), "lat": lat, "lon": lon})


def _solve(field, method, rows=None, seed=0):
    data = field.chunk({"lat": rows or -1, "time": -1})
    weights = area_weights(field["lat"], field["lon"], "coslat")
    return solve(data, weights, K, 0.2, SolverPlan(method, "test", rows), seed)


@pytest.fixture(scope="module")
def exact(field):
    return _solve(field, "exact")


def _close(a: xr.Dataset, b: xr.Dataset, rtol: float) -> None:
    np.testing.assert_allclose(a["eigenvalue"], b["eigenvalue"], rtol=rtol)
    np.testing.assert_allclose(a["variance_explained"], b["variance_explained"], rtol=rtol)
    scale = np.nanmax(np.abs(b["eof"].values))
    np.testing.assert_allclose(a["eof"].values, b["eof"].values, rtol=0, atol=rtol * scale)  # NaN where b has NaN
    np.testing.assert_allclose(a["pc"].values, b["pc"].values, rtol=0, atol=rtol * 10)


@pytest.mark.parametrize("rows", [1, 4, 33])
def test_gram_equals_exact_whatever_the_blocks(field, exact, rows):
    modes, result, counts = _solve(field, "gram", rows)
    _close(modes, exact[0], 1e-8)
    assert counts == exact[2]
    assert result.method.startswith("gram")


@pytest.mark.parametrize("scheduler, workers", [("synchronous", 1), ("threads", 1), ("threads", 2),
                                                ("processes", 2)])
def test_gram_equals_exact_whatever_the_scheduler(field, exact, scheduler, workers):
    with dask.config.set(scheduler=scheduler, num_workers=workers):
        modes, _, _ = _solve(field, "gram", 5)
    _close(modes, exact[0], 1e-8)


def test_randomized_is_within_its_stated_tolerance(field, exact):
    """Stated tolerance: 1e-4 relative on eigenvalues, maps and PCs of well-separated leading modes."""
    modes, result, _ = _solve(field, "randomized", 6)
    _close(modes, exact[0], 1e-4)
    assert "seed 0" in result.method


def test_randomized_stops_when_each_separated_mode_has_its_own_accuracy():
    """A mode apart from its neighbours (by more than North et al. 1982's lambda sqrt(2/n)) needs a residual
    of 1e-4 of its own eigenvalue; modes inside each other's sampling error only 1e-4 of the first."""
    from climodes.solvers import _converged

    ritz = np.array([100.0, 10.0, 1.0, 1.0001, 0.5])  # modes 3 and 4 mixed at n = 1000
    assert _converged(ritz, np.array([1e-2, 1e-3, 5e-3, 5e-3]), 1000)
    assert not _converged(ritz, np.array([1e-2, 2e-3, 5e-3, 5e-3]), 1000)  # mode 2: 2e-4 of its own
    assert not _converged(ritz, np.array([1e-2, 1e-3, 2e-2, 5e-3]), 1000)  # mode 3: 2e-4 of the first


def test_randomized_says_when_it_did_not_converge(field, monkeypatch):
    monkeypatch.setattr("climodes.solvers.RITZ_TOLERANCE", 1e-30)  # out of reach
    _, result, _ = _solve(field, "randomized", 6)
    assert result.method.endswith(f"not converged to its tolerance in {2 + POWER_ITERATIONS} passes")
    assert "use modes.method gram or exact" in result.notes[0]


def test_randomized_does_not_depend_on_blocks_or_threads(field):
    """Stated tolerance: 1e-6 relative between any two blockings of a float32 field (float32 block
    products summed in float64); the random matrix itself does not depend on the blocks."""
    one, _, _ = _solve(field, "randomized", 3, seed=5)
    with dask.config.set(scheduler="threads", num_workers=2):
        two, _, _ = _solve(field, "randomized", 11, seed=5)
    _close(one, two, 1e-6)


@pytest.fixture(scope="module")
def raw_field():
    """A float32 field as archives hold it: 280 K, a seasonal cycle, a trend, then anomalies and gaps."""
    lat = np.linspace(-60, 60, 25)
    lon = np.arange(0, 360, 10.0)
    time = xr.date_range("1981-01-01", periods=192, freq="MS")
    season = 12 * np.cos(2 * np.pi * (time.month.values - 1) / 12)[:, None, None] * np.sin(np.deg2rad(lat))[:, None]
    trend = 0.002 * np.arange(time.size)[:, None, None] * np.cos(np.deg2rad(lon))
    values = (280 + season + trend + red_field((time.size, lat.size, lon.size), 4)).astype(np.float32)
    values[:, 3:6, 4:9] = np.nan  # land
    values[::11, 12, 20] = np.nan  # a gappy point, filled
    values[::2, 14, 21] = np.nan  # too gappy: dropped
    return xr.DataArray(values, dims=("time", "lat", "lon"), coords={"time": time, "lat": lat, "lon": lon})


PREPARATIONS = {
    "climatology": PrepareSection(),
    "baseline and trend": PrepareSection(baseline=["1983-01-01", "1992-12-31"], detrend="linear"),
    "mean only": PrepareSection(anomalies="mean"),
    "standardized": PrepareSection(detrend="linear", standardize=True),
}


@pytest.mark.parametrize("how", PREPARATIONS)
def test_the_time_operator_is_the_preparation_and_its_transpose(raw_field, how):
    """On complete series the steps and centring are a linear map L (common practice for anomalies and
    least-squares trends); L^T, computed a few columns at a time, equals the dense matrix's transpose."""
    field, steps = time_steps(raw_field, PREPARATIONS[how], None, [])
    if not steps.linear:
        assert how == "standardized"
        return
    n = field.sizes["time"]
    series = field.values[:, 0, :].astype(np.float64)  # complete points
    prepared = steps(series)
    np.testing.assert_allclose(time_operator(steps, series), prepared - prepared.mean(axis=0), atol=1e-9)
    dense = time_operator(steps, np.eye(n))
    np.testing.assert_allclose(dense @ series, time_operator(steps, series), atol=1e-8)
    q = np.random.default_rng(0).standard_normal((n, 4))
    np.testing.assert_allclose(time_operator_transposed(steps, q, width=50), dense.T @ q, atol=1e-10)


@pytest.mark.parametrize("how", PREPARATIONS)
def test_streaming_solvers_apply_the_preparation_like_exact(raw_field, how):
    """The cheap path (steps applied to the small products) against the exact solver, which prepares the
    whole field: 1e-8 for gram, the stated 1e-4 for randomized, with land, filled and dropped points."""
    field, steps = time_steps(raw_field, PREPARATIONS[how], None, [])
    weights = area_weights(field["lat"], field["lon"], "coslat")
    exact = solve(field, weights, K, 0.2, SolverPlan("exact", "test"), steps=steps)
    for method, rtol in (("gram", 1e-8), ("randomized", 1e-4)):
        modes, _, counts = solve(field.chunk({"lat": 4, "time": -1}), weights, K, 0.2,
                                 SolverPlan(method, "test", 4), steps=steps)
        _close(modes, exact[0], rtol)
        assert counts == exact[2]
    assert exact[2].too_often_missing == 1 and exact[2].always_missing == 15


def test_the_steps_run_on_each_block_in_the_first_pass_only(field, monkeypatch):
    """The point of the cheap path: after the first pass, complete points are multiplied as read and
    the steps act only on small matrices (an identity-width chunk of 150 columns at most here)."""
    import dataclasses

    import pandas as pd

    from climodes.prepare import STEPS, climatology_step

    widths = []
    step = STEPS["climatology"]

    def fit_and_count(values, keys):
        widths.append(values.shape[1])
        return step.fit(values, keys)

    monkeypatch.setitem(STEPS, "climatology", dataclasses.replace(step, fit=fit_and_count))
    dated = field.assign_coords(time=pd.date_range("1900-01-01", periods=field.sizes["time"], freq="MS"))
    weights = area_weights(field["lat"], field["lon"], "coslat")
    _, result, _ = solve(dated.chunk({"lat": 11, "time": -1}), weights, K, 0.2, SolverPlan("randomized", "t", 11),
                         steps=climatology_step(dated, "mean", None))  # anomalies against the mean: linear
    passes = int(re.search(r"converged in (\d) passes", result.method).group(1))
    assert passes >= 3
    assert sum(w > field.sizes["time"] for w in widths) == 3  # the 3 blocks of 11 rows (528 points), once


def test_the_input_array_is_not_changed(field):
    before = field.values.copy()
    for method in ("exact", "gram", "randomized"):
        _solve(field, method, 8)
    np.testing.assert_array_equal(field.values, before)


@pytest.mark.parametrize("shape, budget, expected", [
    ((120, 20, 30), 4e9, "exact"),
    ((720, 181, 360), 4e9, "gram"),
    ((1500, 361, 720), 2e9, "gram"),
    ((3650, 361, 720), 2e9, "randomized"),
    ((20000, 721, 1440), 4e9, "randomized"),
])
def test_auto_choice(shape, budget, expected):
    plan = plan_solver(shape, 10, "auto", int(budget), 2)
    assert plan.method == expected
    if expected != "exact":
        steps, nlat, nlon = shape
        block_bytes = plan.lat_rows * nlon * steps * 4
        one_row = nlon * steps * 4
        assert block_bytes <= max(128e6, one_row)  # blocks are at most 128 MB, or one latitude row
        assert -(-nlat // plan.lat_rows) >= 8  # at least 4 blocks a worker
        assert 2 * 28 / 4 * block_bytes < budget  # two workers' blocks in flight fit the budget


def test_a_float64_field_is_planned_in_its_own_precision():
    """The randomized solver works in the field's precision (numpy's type promotion with float32: float16 and
    int16 become float32, float64 stays float64), so at one budget a float64 field's blocks hold fewer rows
    than a float32 field's, and the plan names the precision it counted."""
    assert [working_precision(np.dtype(t)) for t in ("float16", "int16", "float32", "float64")] == [
        np.float32, np.float32, np.float32, np.float64]
    shape, budget = (3650, 361, 720), int(2e9)
    single = plan_solver(shape, 10, "randomized", budget, 2, itemsize=4)
    double = plan_solver(shape, 10, "randomized", budget, 2, itemsize=8)
    assert double.lat_rows < single.lat_rows
    assert "(3.79 GB as float32)" in single.reason and "(7.59 GB as float64)" in double.reason


def test_auto_takes_the_randomized_solver_where_the_gram_one_has_no_room():
    """Few steps but too little memory for the Gram solver's time x time matrices and blocks: auto plans the
    randomized solver (which fits) rather than refusing, and says memory decided, not the field's size
    (common practice: a plan's reason names what decided it)."""
    shape = (1500, 181, 360)
    with pytest.raises(UserError, match="too small for the gram solver"):
        plan_solver(shape, 10, "gram", int(0.22e9), 2)
    for budget in (0.21e9, 0.22e9, 0.25e9):
        plan = plan_solver(shape, 10, "auto", int(budget), 2)
        assert plan.method == "randomized" and "take more room than compute.memory leaves" in plan.reason
    assert plan_solver(shape, 10, "auto", int(0.3e9), 2).method == "gram"
    assert "large in both dimensions" in plan_solver((3650, 361, 720), 10, "auto", int(2e9), 2).reason


def test_the_exact_plan_holds_what_the_exact_solver_was_measured_to_use():
    """Measured on Linux (peak resident memory of `climodes run` with modes.method exact, less what the
    process held before reading): 375 MB for 730 steps x 7200 points, 208 MB for 365 x 7200; the plan, with
    the 0.1 GB every plan keeps for the libraries, must hold at least that, and refuse a budget below it."""
    from climodes.solvers import LIBRARY_WORK

    for shape, measured in (((730, 60, 120), 375e6), ((365, 60, 120), 208e6)):
        plan = plan_solver(shape, 4, "exact", int(4e9), 2, in_use=int(1.7e8))
        assert plan.memory >= 1.7e8 + LIBRARY_WORK + measured
    with pytest.raises(UserError, match="modes.method: exact needs about"):
        plan_solver((730, 60, 120), 4, "exact", int(1.7e8 + LIBRARY_WORK + 375e6), 2, in_use=int(1.7e8))


def test_the_budget_is_for_the_whole_process():
    """What the process holds already (the interpreter and its libraries) is not there for blocks: our own
    contract (README, compute.memory), checked here on the plan's arithmetic."""
    shape, budget = (3650, 361, 720), int(2e9)
    alone = plan_solver(shape, 10, "randomized", budget, 2)
    loaded = plan_solver(shape, 10, "randomized", budget, 2, in_use=int(1e9))
    assert loaded.lat_rows < alone.lat_rows
    with pytest.raises(UserError, match=r"compute.memory: 2.00 GB is too small .* give at least 2.\d\d GB \(the "
                                        r"process holds 1.90 GB before it reads\)") as caught:
        plan_solver(shape, 10, "randomized", budget, 2, in_use=int(1.9e9))
    advised = float(str(caught.value).split("give at least ")[1].split(" GB")[0])
    plan_solver(shape, 10, "randomized", int(advised * 1e9), 2, in_use=int(1.9e9))  # the advice is enough


def test_resident_bytes_is_what_the_system_counts():
    """Against the operating system's own peak count (getrusage): now is not above the peak (the kernel
    updates its peak a little late, hence 5 %)."""
    import resource

    from climodes.cluster import resident_bytes

    now = resident_bytes()
    assert 10e6 < now <= 1.05 * resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="the mmap threshold is glibc's")
def test_freed_blocks_go_back_to_the_system():
    """A freed block of 16 MiB leaves the resident set, even after a bigger one was freed, which raises
    glibc's own threshold for mapping blocks on their own above it (glibc's mallopt(3) manual page,
    M_MMAP_THRESHOLD: "dynamic mmap threshold"), without :func:`return_freed_memory` to fix it."""
    from climodes.cluster import resident_bytes, return_freed_memory

    return_freed_memory()
    np.ones(24 * 2**20 // 8)  # made and freed at once
    before = resident_bytes()
    block = np.ones(16 * 2**20 // 8)
    del block
    assert resident_bytes() - before < 2**20


def test_the_freed_threshold_sits_above_the_files_chunks():
    """Freed blocks from 1 MiB go back to the system, but the buffer each chunk of the files is
    decompressed into stays below the threshold (twice the largest chunk), up to glibc's own largest
    (32 MiB on 64-bit: mallopt(3), DEFAULT_MMAP_THRESHOLD_MAX, from memory)."""
    from climodes.cluster import freed_threshold
    from climodes.storage import Storage, chunk_bytes

    tiles = Storage((365, 23, 45), True, (181, 360))
    assert chunk_bytes([tiles, Storage(None, False, (181, 360))], 4) == 365 * 23 * 45 * 4
    assert freed_threshold(chunk_bytes([tiles], 4)) == 2 * 365 * 23 * 45 * 4
    assert freed_threshold(0) == freed_threshold(181 * 360 * 4) == 2**20
    assert freed_threshold(chunk_bytes([Storage((1, 721, 1440), True, (721, 1440))], 8)) == 2 * 721 * 1440 * 8
    assert freed_threshold(chunk_bytes([Storage((10, 721, 1440), True, (721, 1440))], 8)) == 2**25


def test_the_plan_counts_the_readers_chunk_caches():
    """What the readers' chunk caches hold takes the place of blocks in the plan, and is in what it needs:
    our own contract (README, compute.memory), on the plan's arithmetic (70 % of the budget beside what the
    process holds, 16 bytes a value of each worker's block for the randomized solver)."""
    shape, budget, in_use, cache = (3650, 181, 360), int(1.5e9), int(2e8), int(2.4e8)
    bare = plan_solver(shape, 6, "randomized", budget, 2, in_use=in_use)
    cached = plan_solver(shape, 6, "randomized", budget, 2, in_use=in_use, read_cache=lambda rows: cache)
    assert cached.lat_rows < bare.lat_rows and cached.memory <= budget
    assert cached.memory - in_use >= (cache + 2 * 16 * 3650 * 360 * cached.lat_rows) / 0.7
    with pytest.raises(UserError, match="compute.memory: 0.60 GB is too small"):
        plan_solver(shape, 6, "randomized", int(6e8), 2, in_use=in_use, read_cache=lambda rows: cache)


def test_a_budget_too_small_is_a_clear_error():
    with pytest.raises(UserError, match="compute.memory: .* is too small for the gram solver"):
        plan_solver((3650, 361, 720), 10, "gram", int(60e6), 2)
    with pytest.raises(UserError, match="modes.method: exact needs about"):
        plan_solver((3650, 361, 720), 10, "exact", int(2e9), 2)


def test_the_gram_plan_is_the_gram_matrix_and_a_few_blocks():
    """3650 daily steps x 1 degree (0.95 GB in float32): its Gram matrix is 0.11 GB; the plan holds a few of
    them (the sum, one product per worker, the eigendecomposition's) and blocks, within 1.5 GB."""
    plan = plan_solver((3650, 181, 360), 6, "gram", int(1.5e9), 2, in_use=int(0.15e9))
    assert plan.method == "gram" and plan.memory <= 1.5e9
    gram = 3650**2 * 8
    assert plan.memory - 0.15e9 <= 2 * (5 * gram + 2 * 28 * 3650 * plan.lat_rows * 360) / 0.7


def test_the_gram_matrix_added_in_place_is_the_product():
    """BLAS dsyrk into the upper triangle, then the lower one copied: numpy's ``a @ a.T`` (the reference)."""
    from climodes.blocks import add_gram, symmetric

    rng = np.random.default_rng(1)
    blocks = [rng.standard_normal((1100, width)) for width in (7, 300, 0)]
    gram = np.zeros((1100, 1100), order="F")
    for block in blocks:
        add_gram(gram, block)
    expected = sum(block @ block.T for block in blocks)
    np.testing.assert_allclose(symmetric(gram), expected, rtol=1e-12, atol=1e-10)


@pytest.mark.parametrize("held", [True, False])
@pytest.mark.parametrize("method, passes", [("exact", 1), ("gram", 2), ("randomized", None)])
def test_reads_per_solver(tmp_path, cli, values_read, monkeypatch, method, passes, held):
    """Count the values read from the files: once when the field fits compute.memory (``held``), else
    one pass per pass of the algorithm (these files are stored contiguously: read in rows), no more."""
    if not held:
        from climodes.storage import plan_reading

        monkeypatch.setattr("climodes.pipeline.plan_reading", lambda *args, **kw: plan_reading(*args[:4], 0, True))
    lat = np.linspace(-60, 60, 25)
    lon = np.arange(0, 360, 10.0)
    paths = []
    for part in range(3):
        time = xr.date_range(f"{1990 + 4 * part}-01-01", periods=48, freq="MS")
        path = tmp_path / f"f{part}.nc"
        field_dataset(red_field((48, lat.size, lon.size), part).astype(np.float32), lat, lon, time=time).to_netcdf(path)
        paths.append(path)
    config = write_config(tmp_path, paths, modes={"count": 3, "method": method}, compute={"memory": "4GB"},
                          prepare={"detrend": "linear"})
    code, out, err = cli("run", config)
    assert code == 0, err
    ds = xr.open_dataset(tmp_path / "out" / "modes.nc")
    if passes is None:  # the randomized solver says how many passes it needed to converge
        passes = int(re.search(r"converged in (\d) passes", ds.attrs["climodes_method"]).group(1))
        assert 2 <= passes <= 2 + POWER_ITERATIONS
    assert values_read["values"] == (1 if held else passes) * 144 * lat.size * lon.size
    assert ds.attrs["climodes_method"].startswith(method)
    assert "chosen because" in ds.attrs["climodes_method"]


def test_progress_bars_only_when_asked(tmp_path, small_field, capsys, monkeypatch):
    from climodes.cluster import show_progress
    from climodes.config import load_spec
    from climodes.pipeline import run

    config = write_config(tmp_path, [small_field], modes={"count": 2, "method": "gram"})
    run(load_spec(config), progress=True)
    err = capsys.readouterr().err
    assert "pass 1 of 2: time x time cross-products" in err and "pass 2 of 2: EOF maps" in err
    config = write_config(tmp_path, [small_field], modes={"count": 2, "method": "gram"}, output={"overwrite": True})
    run(load_spec(config), progress=False)
    assert capsys.readouterr().err == ""
    monkeypatch.setattr("sys.stderr.isatty", lambda: True, raising=False)
    assert show_progress(quiet=False) and not show_progress(quiet=True)


@pytest.mark.parametrize("scheduler", ["threads", pytest.param("processes", marks=pytest.mark.slow)])
def test_every_method_gives_the_same_run(tmp_path, cli, raw_field, scheduler):
    """Through the whole pipeline (DJF means, baseline climatology, trend, a gappy point, 3 files):
    gram equals exact to 1e-8, randomized to the stated 1e-4, on either scheduler."""
    paths = []
    for part, years in enumerate([slice(0, 64), slice(64, 128), slice(128, 192)]):
        path = tmp_path / f"f{part}.nc"
        piece = raw_field.isel(time=years)
        field_dataset(piece.values, piece["lat"].values, piece["lon"].values, time=piece["time"].values).to_netcdf(path)
        paths.append(path)
    results = {}
    for method in ("exact", "gram", "randomized"):
        folder = tmp_path / method
        folder.mkdir()
        config = write_config(folder, paths, select={"months": [12, 1, 2]},
                              prepare={"aggregate": "seasonal", "baseline": ["1982-01-01", "1990-12-31"],
                                       "detrend": "linear", "max_missing": 0.3},
                              modes={"count": K, "method": method}, compute={"scheduler": scheduler})
        code, _, err = cli("run", config)
        assert code == 0, err
        results[method] = xr.open_dataset(folder / "out" / "modes.nc")
    assert results["exact"].sizes["time"] == 15  # winters 1982..1996; 1981 lacks its December
    _close(results["gram"], results["exact"], 1e-8)
    _close(results["randomized"], results["exact"], 1e-4)


def _archive_field(freq: str, periods: int, ny: int, nx: int, dtype=np.float64) -> xr.DataArray:
    """A field as archives hold it (280 K, a seasonal cycle, a trend, red noise) with land, a gappy point
    that is filled and a gappier one that is dropped."""
    lat, lon = np.linspace(-60, 60, ny), np.arange(nx) * (360 / nx)
    time = xr.date_range("1981-01-01", periods=periods, freq=freq)
    day = xr.DataArray(time, dims="time").dt.dayofyear.values
    season = 12 * np.cos(2 * np.pi * (day - 1) / 365.25)[:, None, None] * np.sin(np.deg2rad(lat))[:, None]
    trend = 0.0005 * np.arange(periods)[:, None, None] * np.cos(np.deg2rad(lon))
    values = (280 + season + trend + red_field((periods, ny, nx), 4)).astype(dtype)
    values[:, 3:5, 4:6] = np.nan
    values[::11, 6, 7] = np.nan
    values[::2, 7, 8] = np.nan
    return xr.DataArray(values, dims=("time", "lat", "lon"), coords={"time": time, "lat": lat, "lon": lon})


def _winters(field: xr.DataArray) -> xr.DataArray:
    return field.isel(time=np.flatnonzero(np.isin(field["time"].dt.month, [12, 1, 2])))


FITTED = {  # field, preparation, months
    "monthly climatology": (lambda: _archive_field("MS", 180, 12, 18), PrepareSection(max_missing=0.2), None),
    "daily climatology": (lambda: _archive_field("D", 731, 28, 28), PrepareSection(max_missing=0.2), None),
    "baseline and trend": (lambda: _archive_field("MS", 180, 12, 18),
                           PrepareSection(baseline=["1983-01-01", "1986-12-31"], detrend="linear", max_missing=0.2),
                           None),
    "standardized": (lambda: _archive_field("MS", 180, 12, 18),
                     PrepareSection(detrend="linear", standardize=True, max_missing=0.2), None),
    "winter means": (lambda: _winters(_archive_field("MS", 360, 12, 18)),
                     PrepareSection(aggregate="seasonal", baseline=["1982", "1990"], detrend="linear",
                                    max_missing=0.3), [12, 1, 2]),
}


@pytest.mark.parametrize("how, method", [
    pytest.param(how, method, marks=[pytest.mark.slow] if (how, method) == ("daily climatology", "randomized") else [])
    for how in FITTED for method in ("exact", "gram", "randomized")])
def test_the_stored_fit_gives_back_the_anomalies_each_solver_decomposed(how, method):
    """With every mode kept, sum_k pc_k eof_k is the anomaly matrix the solver decomposed (our results
    contract: eof is the regression of the anomaly on the standardised PC, and the PCs span its time
    space).  The fit the first pass returned, applied to the training field, gives that matrix to 1e-10,
    at the filled steps of a gappy point too; unapply gives the field back."""
    from climodes.prepare import apply, fitted_preparation, keys_of, unapply

    make, spec, months = FITTED[how]
    field, steps = time_steps(make(), spec, months, [])
    weights = area_weights(field["lat"], field["lon"], "coslat")
    n = field.sizes["time"]
    data = field if method == "exact" else field.chunk({"lat": 4, "time": -1})
    modes, _, counts = solve(data, weights, n - 1, spec.max_missing, SolverPlan(method, "test", 4), steps=steps)
    assert counts.used < counts.grid and counts.filled_values > 0
    fitted = fitted_preparation(modes)
    keys = keys_of(field["time"], fitted)
    anomalies = apply(field.values, fitted, keys)
    used = modes["point_status"].values == 2
    decomposed = np.einsum("kt,kyx->tyx", modes["pc"].values, modes["eof"].values)
    np.testing.assert_allclose(anomalies[:, used], decomposed[:, used], rtol=0, atol=1e-10 * np.nanmax(np.abs(decomposed)))
    assert np.isnan(anomalies[:, ~used]).all()
    valid = ~np.isnan(field.values) & used
    np.testing.assert_allclose(unapply(anomalies, fitted, keys)[valid], field.values[valid], rtol=1e-13)


def test_a_float32_field_keeps_the_fit_the_randomized_solver_applied():
    """The randomized solver forms a float32 field's anomalies in float32; the fit it keeps is in that
    precision, so it is exactly what was applied: the round trip holds to float32 precision."""
    from climodes.prepare import apply, fitted_preparation, keys_of

    field, steps = time_steps(_archive_field("MS", 120, 12, 18, np.float32), PrepareSection(detrend="linear",
                                                                                             max_missing=0.2), None, [])
    weights = area_weights(field["lat"], field["lon"], "coslat")
    modes, _, _ = solve(field.chunk({"lat": 4, "time": -1}), weights, 119, 0.2, SolverPlan("randomized", "test", 4),
                        steps=steps)
    assert modes["fitted_climatology"].dtype == np.float32 and modes["fitted_offset"].dtype == np.float32
    fitted = fitted_preparation(modes)
    anomalies = apply(field.values, fitted, keys_of(field["time"], fitted))
    assert anomalies.dtype == np.float32
    used = modes["point_status"].values == 2
    decomposed = np.einsum("kt,kyx->tyx", modes["pc"].values, modes["eof"].values)
    np.testing.assert_allclose(anomalies[:, used], decomposed[:, used], rtol=0, atol=1e-5 * np.nanmax(np.abs(decomposed)))


def test_freed_blocks_are_returned_only_where_the_plan_has_no_room_for_what_glibc_keeps(monkeypatch, tmp_path):
    """glibc's own threshold is faster (each big block is not mapped anew), but keeps up to a few hundred MB
    of freed blocks: the threshold is fixed only where the plan leaves less than that unused."""
    import climodes.cluster
    from climodes.config import ComputeSection

    calls = []
    monkeypatch.setattr(climodes.cluster, "return_freed_memory", lambda threshold: calls.append(threshold))
    for slack in (0.0, climodes.cluster.FREED_KEPT - 1, climodes.cluster.FREED_KEPT + 1, 3e9):
        with climodes.cluster.running(ComputeSection(), False, "00:10:00", tmp_path, slack=slack):
            pass
    assert calls == [2**20, 2**20]
