"""The red-noise test: surrogates that are the fitted noise, a level that holds, and one answer whatever
the blocks, threads or processes.

References: Preisendorfer (1988, Principal Component Analysis in Meteorology and Oceanography, Rule N)
for the idea; the Monte Carlo test's rank argument (a value exchangeable with S others exceeds the
ceil(p (S + 1))-th smallest with probability at most 1 - p; common practice) and the binomial
distribution (scipy.stats) for how often pure noise may pass; numpy's SVD for the surrogates' spectra;
hand-computed cases (common practice).
"""

import dask
import numpy as np
import pytest
import scipy.stats
import xarray as xr
from threadpoolctl import threadpool_limits

from climodes.blocks import series_moments
from climodes.significance import (
    RedNoise,
    fit_red_noise,
    noise_eigenvalues,
    noise_rank,
    red_noise_test,
    significant_modes,
    surrogate_block,
    surrogate_spectrum,
)
from climodes.solvers import exact_modes
from conftest import field_dataset, write_config


def test_noise_rank_hand_computed():
    """ceil(p (S + 1)): 19 of 19 at 0.95 (P = 1/20 exactly), 95 of 99, 18 of 19 at 0.9 (P = 2/20); with 100
    surrogates at 0.95 the 96th (exceeded with P = 5/101; the 95th would allow 6/101), with 20 at 0.9 the 19th."""
    assert [noise_rank(0.95, 19), noise_rank(0.95, 99), noise_rank(0.9, 19), noise_rank(0.9, 9)] == [19, 95, 18, 9]
    assert [noise_rank(0.95, 100), noise_rank(0.9, 20)] == [96, 19]
    spectra = np.arange(1.0, 20.0)[:, None] * np.array([1.0, 0.5])  # 19 surrogates, 2 ranks
    np.testing.assert_array_equal(noise_eigenvalues(spectra[::-1], 0.9), [18.0, 9.0])


def test_the_count_stops_at_the_first_failure():
    """Hand-computed: mode 3 is below its noise eigenvalue, so mode 4 is not significant although it is
    above its own (the count of significant modes stops at the first failure)."""
    flags = significant_modes(np.array([9.0, 4.0, 2.0, 1.5, 1.4]), np.array([3.0, 2.5, 2.1, 1.0, 1.0]))
    np.testing.assert_array_equal(flags, [True, True, False, False, False])
    assert not significant_modes(np.array([1.0, 0.9]), np.array([1.5, 0.1])).any()


def test_fit_red_noise_hand_computed():
    """r = sum a_t a_(t+1) / sum a_t^2 and s^2 = sum a_t^2 / (n - 1), times the weight (by hand):
    a = [1, -1, 2, -2] sums of squares 10, lag-1 products -1 - 2 - 4 = -7: r = -0.7, s^2 = 10 / 3."""
    a = np.array([[1.0, 0.0], [-1.0, 0.0], [2.0, 0.0], [-2.0, 0.0]])
    noise = fit_red_noise(series_moments(a), np.array([0.5, 1.0]), 4, (1, 2))
    np.testing.assert_allclose(noise.lag1, [[-0.7, 0.0]])
    np.testing.assert_allclose(noise.scale, [[0.5 * np.sqrt(10 / 3), 0.0]])


def test_surrogates_are_the_fitted_red_noise():
    """Long surrogates against their model: each point's lag-1 autocorrelation within 5 standard errors
    (sqrt((1 - r^2) / n), Bartlett's formula for AR(1), from memory) and its variance within 5 errors
    (sqrt(2 / N*), Bretherton et al. 1999); points independent of each other (|correlation| below 5 / sqrt(n))."""
    rng = np.random.default_rng(4)
    lag1 = rng.uniform(-0.3, 0.9, (4, 6))
    scale = rng.uniform(0.5, 2.0, (4, 6))
    scale[1, 2] = 0.0  # a point not used
    n = 4000
    z = surrogate_block(RedNoise(lag1, scale), range(0, 4), n, 7, 3)
    assert z.shape == (n, 23)
    used = scale > 0
    r, s = lag1[used], scale[used]
    moments = series_moments(z)
    np.testing.assert_array_less(np.abs(moments[:, 1] / moments[:, 0] - r), 5 * np.sqrt((1 - r**2) / n))
    variance_error = np.sqrt(2 * (1 + r**2) / (1 - r**2) / n)
    np.testing.assert_array_less(np.abs(moments[:, 0] / (n - 1) / s**2 - 1), 5 * variance_error)
    off = np.corrcoef(z.T)[np.triu_indices(23, 1)]
    assert np.abs(off).max() < 5 / np.sqrt(n / 10)  # the reddest pairs have about a tenth of n independent values


def _red_noise_field(rng: np.random.Generator, steps: int = 120) -> np.ndarray:
    """Independent AR(1) series at every point, each with its own lag-1 (0.2..0.8) and spread; 2 land points."""
    r = rng.uniform(0.2, 0.8, 80)
    x = np.empty((steps, 80))
    x[0] = rng.standard_normal(80)
    for t in range(1, steps):
        x[t] = r * x[t - 1] + np.sqrt(1 - r**2) * rng.standard_normal(80)
    x *= rng.uniform(0.5, 2.0, 80)
    x[:, 23:25] = np.nan
    return x


WEIGHTS = np.sqrt(np.cos(np.deg2rad(np.repeat(np.linspace(-60, 60, 8), 10))))


def _anomaly(x: np.ndarray) -> np.ndarray:
    """Centred series, zero at the land points."""
    used = ~np.isnan(x).any(axis=0)
    anomaly = np.zeros(x.shape)
    anomaly[:, used] = x[:, used] - x[:, used].mean(axis=0)
    return anomaly


def _test_run(x: np.ndarray, count: int, surrogates: int, level: float, seed: int):
    anomaly = _anomaly(x)
    used = ~np.isnan(x).any(axis=0)
    result = exact_modes(anomaly[:, used], WEIGHTS[used], count)
    noise = fit_red_noise(series_moments(anomaly), WEIGHTS, x.shape[0], (8, 10))
    return result, red_noise_test(result.eigenvalues, noise, x.shape[0], surrogates, level, seed)


@pytest.mark.slow
def test_pure_red_noise_passes_no_more_often_than_the_level():
    """300 seeded fields of pure red noise, each tested with 19 surrogates at level 0.9: a run calls a mode
    significant only when mode 1 passes, which must happen in at most 10 % of runs; allowed up to the
    binomial(300, 0.1) 99.9 % quantile (scipy.stats).  (The test is conservative: about 4 % pass.)"""
    runs, level = 300, 0.9
    passed = 0
    with dask.config.set(scheduler="synchronous"), threadpool_limits(1, user_api="blas"):  # small matrices
        for seed in range(runs):
            _, test = _test_run(_red_noise_field(np.random.default_rng(1000 + seed)), 3, 19, level, seed)
            passed += bool(test.significant.any())
    assert passed <= scipy.stats.binom.ppf(0.999, runs, 1 - level)


def test_planted_modes_stand_above_red_noise():
    """Two planted modes (pattern times a red PC) well above the noise: both significant, the noise modes
    after them not; the noise eigenvalues decrease with rank."""
    rng = np.random.default_rng(3)
    x = _red_noise_field(rng)
    patterns = np.linalg.qr(rng.standard_normal((80, 2)))[0].T * np.sqrt(80)
    x += np.outer(4 * rng.standard_normal(120), patterns[0]) + np.outer(2.5 * rng.standard_normal(120), patterns[1])
    with dask.config.set(scheduler="synchronous"):
        _, test = _test_run(x, 5, 39, 0.95, 0)
    np.testing.assert_array_equal(test.significant, [True, True, False, False, False])
    assert np.all(np.diff(test.noise_eigenvalues) < 0)


def test_surrogate_spectrum_is_the_same_whatever_the_blocks_and_method():
    """One surrogate, however it is cut, against numpy's SVD of it: the cross-product of the whole, the
    Gram matrix over blocks of 1, 3 or 12 rows (1e-10); the block Krylov sketch, within 1 % of the leading
    eigenvalues (stated in the docs)."""
    rng = np.random.default_rng(6)
    noise = RedNoise(rng.uniform(0.0, 0.9, (12, 30)), rng.uniform(0.5, 2.0, (12, 30)))
    whole = surrogate_block(noise, range(0, 12), 300, 2, 5)
    reference = np.linalg.svd(whole, compute_uv=False)[:10] ** 2 / 299  # numpy's LAPACK
    np.testing.assert_allclose(surrogate_spectrum(noise, 300, 10, 2, 5, method="whole"), reference, rtol=1e-10)
    for rows in (1, 3, 12):
        np.testing.assert_allclose(surrogate_spectrum(noise, 300, 10, 2, 5, rows=rows, method="gram"), reference,
                                   rtol=1e-10)
    narrow = RedNoise(noise.lag1[:3, :10], noise.scale[:3, :10])  # fewer points than steps
    few = np.linalg.svd(surrogate_block(narrow, range(0, 3), 300, 2, 5), compute_uv=False)[:10] ** 2 / 299
    np.testing.assert_allclose(surrogate_spectrum(narrow, 300, 10, 2, 5, method="whole"), few, rtol=1e-10)
    sketch = surrogate_spectrum(noise, 300, 10, 2, 5, rows=4, method="sketch")
    np.testing.assert_allclose(sketch[:5], reference[:5], rtol=0.01)
    assert np.all(sketch <= reference * (1 + 1e-10))  # Ritz values are lower bounds


@pytest.mark.parametrize("scheduler, workers", [("synchronous", 1), ("threads", 2), ("processes", 2)])
@pytest.mark.parametrize("rows", [1, 3, None])
def test_the_test_does_not_depend_on_blocks_or_scheduler(scheduler, workers, rows):
    """One seed per (surrogate, latitude row): the same noise eigenvalues (1e-12) and flags for any blocks
    and any dask scheduler, as the unblocked synchronous run gives."""
    x = _red_noise_field(np.random.default_rng(8), 60)
    with dask.config.set(scheduler="synchronous"):
        result, reference = _test_run(x, 3, 19, 0.95, 4)
    noise = fit_red_noise(series_moments(_anomaly(x)), WEIGHTS, 60, (8, 10))
    with dask.config.set(scheduler=scheduler, num_workers=workers):
        again = red_noise_test(result.eigenvalues, noise, 60, 19, 0.95, 4, rows)
    np.testing.assert_allclose(again.noise_eigenvalues, reference.noise_eigenvalues, rtol=1e-12)
    np.testing.assert_array_equal(again.significant, reference.significant)


def _planted_file(tmp_path):
    rng = np.random.default_rng(12)
    lat, lon = np.linspace(-50, 50, 11), np.arange(0, 360, 20.0)
    values = 0.7 * rng.standard_normal((150, lat.size, lon.size))
    for t in range(1, 150):
        values[t] += 0.6 * values[t - 1]
    values += 2 * rng.standard_normal(150)[:, None, None] * np.cos(np.deg2rad(lon))[None, None, :]
    values[:, 4, 6:9] = np.nan  # land
    values[::9, 7, 2] = np.nan  # a gappy point
    path = tmp_path / "planted.nc"
    field_dataset(values, lat, lon).to_netcdf(path)
    return path


def _run(tmp_path, cli, path, name, method, scheduler):
    folder = tmp_path / name
    folder.mkdir()
    config = write_config(folder, [path], modes={"count": 4, "method": method, "noise_surrogates": 39},
                          compute={"scheduler": scheduler})
    code, out, err = cli("run", config)
    assert code == 0, err
    return xr.open_dataset(folder / "out" / "modes.nc"), out, folder / "out"


@pytest.mark.parametrize("method, scheduler", [("gram", "threads"),
                                               pytest.param("randomized", "processes", marks=pytest.mark.slow)])
def test_the_results_say_which_modes_stand_above_red_noise(tmp_path, cli, method, scheduler):
    """Through the whole run: noise_eigenvalue and significant in modes.nc, the verdict in run.log and show;
    the same answer from every solver and scheduler as from the exact solver on threads (1e-8: the solvers'
    fitted moments agree to that)."""
    path = _planted_file(tmp_path)
    exact, _, _ = _run(tmp_path, cli, path, "exact", "exact", "threads")
    ds, out, folder = _run(tmp_path, cli, path, method, method, scheduler)
    assert exact["significant"].values.tolist() == ds["significant"].values.tolist() == [1, 0, 0, 0]
    np.testing.assert_allclose(ds["noise_eigenvalue"].values, exact["noise_eigenvalue"].values, rtol=1e-8)
    assert ds["significant"].dtype == np.int8 and ds["significant"].attrs["flag_values"].tolist() == [0, 1]
    assert ds["noise_eigenvalue"].attrs["surrogates"] == 39 and ds["noise_eigenvalue"].attrs["level"] == 0.95
    assert "red noise 95%  significant" in out and "red noise 95%  significant" in (folder / "run.log").read_text()
    shown = cli("show", folder)[1]
    assert "red noise 95%  significant" in shown and "39 red-noise fields" in shown


@pytest.mark.parametrize("method", ["exact", "gram", "randomized"])
def test_the_test_reads_no_data(tmp_path, cli, values_read, method):
    """The surrogates need only each point's lag-1 and variance, from the solver's first pass: a run with
    the test reads exactly as many values from the files as one without (counted at the netCDF4 backend)."""
    path = _planted_file(tmp_path)
    counts = []
    for surrogates in (0, 19):
        folder = tmp_path / f"s{surrogates}"
        folder.mkdir()
        values_read["values"] = 0
        config = write_config(folder, [path], modes={"count": 3, "method": method, "noise_surrogates": surrogates})
        code, _, err = cli("run", config)
        assert code == 0, err
        counts.append(values_read["values"])
    assert counts[0] == counts[1] > 0
