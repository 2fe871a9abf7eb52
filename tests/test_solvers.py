"""The decomposition against independent references.

References: the ``eofs`` package (Dawson 2016, J. Open Res. Softw. 4, e14), an independent EOF
implementation from the design card; scikit-learn's PCA; and the algebra of the SVD.
"""

import numpy as np
import pytest
import xarray as xr
from eofs.standard import Eof
from sklearn.decomposition import PCA

from climodes.solvers import SolverPlan, exact_modes, sign_rule, solve
from climodes.weights import area_weights
from conftest import red_field

K = 3  # the red fields plant three well-separated modes


def _field(masked: bool, seed: int) -> xr.DataArray:
    lat = np.linspace(-80, 80, 17)
    lon = np.arange(0, 360, 12.0)
    values = red_field((80, lat.size, lon.size), seed)
    if masked:  # a block of "land", missing at every step
        values[:, 5:9, 10:16] = np.nan
    return xr.DataArray(values, dims=("time", "lat", "lon"),
                        coords={"time": np.arange(80), "lat": lat, "lon": lon})


def _corr(a: np.ndarray, b: np.ndarray) -> float:
    ok = np.isfinite(a) & np.isfinite(b)
    return float(np.corrcoef(a[ok], b[ok])[0, 1])


@pytest.mark.parametrize("masked", [False, True])
@pytest.mark.parametrize("seed", [1, 2])
def test_matches_eofs_package(masked, seed):
    field = _field(masked, seed)
    weights = area_weights(field["lat"], field["lon"], "coslat")
    modes, _, _ = solve(field, weights, K, max_missing=0.0)

    ref = Eof(field.values, weights=weights.values, center=True, ddof=1)
    ref_fraction = ref.varianceFraction(K)
    ref_pcs = ref.pcs(npcs=K, pcscaling=1)
    ref_maps = ref.eofsAsCovariance(neofs=K, pcscaling=1)  # covariance with unit PCs = our regression maps

    # eofs: variance fraction equal to 1e-6 (issue acceptance threshold)
    np.testing.assert_allclose(modes["variance_explained"].values, ref_fraction, atol=1e-6)
    lat2d, lon2d = np.meshgrid(field["lat"], field["lon"], indexing="ij")
    valid = np.isfinite(ref_maps[0].reshape(-1))
    ref_signs = sign_rule(ref_maps.reshape(K, -1).T[valid], lat2d.reshape(-1)[valid], lon2d.reshape(-1)[valid])
    for k in range(K):
        ours = modes["eof"].values[k].reshape(-1)
        theirs = ref_signs[k] * ref_maps[k].reshape(-1)
        # same pattern and PC, with the sign our rule gives once applied to eofs' result
        assert _corr(ours, theirs) >= 0.99999
        assert _corr(modes["pc"].values[k], ref_signs[k] * ref_pcs[:, k]) >= 0.99999
        np.testing.assert_allclose(ours[valid], theirs[valid], rtol=1e-6, atol=1e-9)
    # masked points stay NaN in the maps, as in eofs
    assert np.array_equal(np.isnan(modes["eof"].values[0]), np.isnan(ref_maps[0]))


def test_eigenvalues_match_scikit_learn_pca():
    field = _field(True, 3)
    weights = area_weights(field["lat"], field["lon"], "coslat")
    modes, result, _ = solve(field, weights, 6, max_missing=0.0)
    flat = field.values.reshape(field.sizes["time"], -1)
    keep = ~np.isnan(flat).any(axis=0)
    weighted = flat[:, keep] * weights.values.reshape(-1)[keep]
    pca = PCA(n_components=6, svd_solver="full").fit(weighted)  # centres the matrix itself
    # scikit-learn: explained_variance_ = s^2 / (n - 1), the same definition as ours
    np.testing.assert_allclose(modes["eigenvalue"].values, pca.explained_variance_, rtol=1e-10)
    np.testing.assert_allclose(result.total_variance, np.var(weighted, axis=0, ddof=1).sum(), rtol=1e-12)


def test_all_modes_rebuild_the_anomaly():
    """SVD algebra: the sum over every mode of pc * eof is the centred anomaly (1e-10)."""
    rng = np.random.default_rng(7)
    nt, ny, nx = 30, 6, 8
    field = xr.DataArray(rng.standard_normal((nt, ny, nx)) * 3 + 10, dims=("time", "lat", "lon"),
                         coords={"time": np.arange(nt), "lat": np.linspace(-50, 50, ny), "lon": np.arange(nx) * 10.0})
    weights = area_weights(field["lat"], field["lon"], "coslat")
    modes, _, _ = solve(field, weights, nt - 1, max_missing=0.0)  # rank of a centred matrix: nt - 1
    rebuilt = np.einsum("kt,kyx->tyx", modes["pc"].values, modes["eof"].values)
    np.testing.assert_allclose(rebuilt, field - field.mean("time"), atol=1e-10)


def test_pcs_are_standardised_and_uncorrelated():
    """Contract: PCs have zero mean and unit variance (ddof=1), and are mutually orthogonal (SVD)."""
    field = _field(False, 4)
    modes, _, _ = solve(field, area_weights(field["lat"], field["lon"], "coslat"), 5, 0.0)
    pcs = modes["pc"].values
    np.testing.assert_allclose(pcs.mean(axis=1), 0, atol=1e-12)
    np.testing.assert_allclose(np.cov(pcs), np.eye(5), atol=1e-10)


def test_sign_rule_largest_value_positive_whatever_the_grid_order():
    field = _field(True, 5)
    weights = area_weights(field["lat"], field["lon"], "coslat")
    modes, _, _ = solve(field, weights, K, 0.0)
    for k in range(K):
        m = modes["eof"].values[k]
        assert m[np.unravel_index(np.nanargmax(np.abs(m)), m.shape)] > 0
    flipped = field.isel(lat=slice(None, None, -1), lon=np.roll(np.arange(field.sizes["lon"]), 7))
    again, _, _ = solve(flipped, weights.isel(lat=slice(None, None, -1)), K, 0.0)
    xr.testing.assert_allclose(again["eof"].sortby("lat").sortby("lon"), modes["eof"].sortby("lat").sortby("lon"))
    np.testing.assert_allclose(again["pc"].values, modes["pc"].values, atol=1e-10)


def test_sign_rule_breaks_ties_by_the_southernmost_point():
    patterns = np.array([[1.0, 0.5, -1.0], [-1.0, 0.2, 1.0]]).T  # mode 1: +1 at lat 10, -1 at lat -10
    lat = np.array([10.0, 0.0, -10.0])
    lon = np.zeros(3)
    np.testing.assert_array_equal(sign_rule(patterns, lat, lon), [-1.0, 1.0])


def test_exact_modes_zero_weight_points_still_get_a_map():
    """A pole row has weight 0; its map is the regression of its anomaly on the PCs (common practice)."""
    rng = np.random.default_rng(0)
    a = rng.standard_normal((40, 5))
    a -= a.mean(axis=0)
    w = np.array([0.0, 1.0, 1.0, 0.8, 0.5])
    result = exact_modes(a, w, 2)
    expected = a.T @ result.pcs / 39
    np.testing.assert_allclose(result.patterns, expected)
    assert np.all(np.isfinite(result.patterns[0]))


def _known_rank_field(eigenvalues: list[float], dtype=np.float64, nt: int = 60) -> xr.DataArray:
    """A field of rank ``len(eigenvalues)`` whose weighted covariance has exactly those eigenvalues.

    Built from orthonormal weighted patterns q_k and centred, orthogonal series a_k with
    sum(a_k^2) = (n - 1) lambda_k, so that X = sum_k a_k q_k^T is already its own SVD (SVD algebra).
    """
    rng = np.random.default_rng(11)
    lat, lon = np.linspace(-80, 80, 17), np.arange(0, 360, 12.0)
    w = area_weights(xr.DataArray(lat, dims="lat"), xr.DataArray(lon, dims="lon"), "coslat").values.reshape(-1)
    q = np.linalg.qr(rng.standard_normal((w.size, len(eigenvalues))))[0]
    series = rng.standard_normal((nt, len(eigenvalues)))
    a = np.linalg.qr(series - series.mean(axis=0))[0] * np.sqrt((nt - 1) * np.array(eigenvalues))
    values = (a @ q.T / w).reshape(nt, lat.size, lon.size).astype(dtype)
    return xr.DataArray(values, dims=("time", "lat", "lon"), coords={"time": np.arange(nt), "lat": lat, "lon": lon})


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("method", ["exact", "gram", "randomized"])
def test_count_above_the_rank_keeps_only_the_non_null_modes(method, dtype):
    """A rank-3 field asked for 6 modes: 3 come back, with the planted eigenvalues (SVD algebra), unit-variance
    uncorrelated PCs (the contract), and a note; the next eigenvalue is null, so mode 3 stands apart."""
    field = _known_rank_field([9.0, 4.0, 1.0], dtype)
    plan = SolverPlan(method, "test", None if method == "exact" else 4)
    modes, result, _ = solve(field, area_weights(field["lat"], field["lon"], "coslat"), 6, 0.0, plan)
    assert modes.sizes["mode"] == 3 and modes["mode"].values.tolist() == [1, 2, 3]
    np.testing.assert_allclose(modes["eigenvalue"].values, [9.0, 4.0, 1.0], rtol=1e-5)
    np.testing.assert_allclose(np.cov(modes["pc"].values), np.eye(3), atol=1e-5)
    np.testing.assert_allclose(modes["variance_explained"].values.sum(), 1.0, rtol=1e-5)
    assert result.next_eigenvalue == 0.0
    assert result.notes[-1] == ("modes.count asks for 6 modes, but the prepared field has only 3 that are not null "
                                "(eigenvalue 4 is below 1e-13 of the first): 3 modes kept")


@pytest.mark.parametrize("method", ["exact", "gram"])
def test_a_weak_mode_above_the_null_tolerance_is_kept(method):
    """The null rule is relative to the leading eigenvalue: a mode 1e-6 of it is weak, not null."""
    field = _known_rank_field([1.0, 0.5, 1e-6])
    plan = SolverPlan(method, "test", None if method == "exact" else 4)
    modes, result, _ = solve(field, area_weights(field["lat"], field["lon"], "coslat"), 4, 0.0, plan)
    assert modes.sizes["mode"] == 3
    np.testing.assert_allclose(modes["eigenvalue"].values, [1.0, 0.5, 1e-6], rtol=1e-6)
