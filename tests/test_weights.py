"""Area weighting, checked on an analytic case.

Real spherical harmonics are orthonormal on the sphere (any text on them; built here with
``scipy.special.sph_harm_y``).  A field sum_k a_k pc_k(t) Y_k(x) with orthonormal PCs therefore
has, under correct area weighting, eigenvalues proportional to a_k^2 and EOFs equal to Y_k.  On a
regular 1-degree grid the cell-centre (midpoint) quadrature of these smooth functions is exact to
about (1 deg in radians)^2 / 24 ~ 1.3e-5 relative, so 1e-4 is a tolerance with room to spare.
"""

import numpy as np
import pytest
import xarray as xr
from scipy.special import sph_harm_y

from climodes.solvers import solve
from climodes.weights import area_weights, cell_area_fraction, usable_points

AMPLITUDES = np.array([3.0, 2.0, 1.0])
DEGREES = [(1, 0), (3, 0), (2, 1)]  # (l, m): Y_1^0 and Y_3^0 are not orthogonal without the cos(lat) weight


def _real_harmonic(l: int, m: int, lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    colat, azimuth = np.meshgrid(np.deg2rad(90 - lat), np.deg2rad(lon), indexing="ij")
    y = sph_harm_y(l, m, colat, azimuth)
    return np.sqrt(2) * (-1) ** m * y.real if m else y.real


@pytest.fixture(scope="module")
def harmonic_field():
    lat = np.arange(-89.5, 90, 1.0)
    lon = np.arange(0.5, 360, 1.0)
    rng = np.random.default_rng(11)
    q = rng.standard_normal((40, 3))
    q -= q.mean(axis=0)
    q, _ = np.linalg.qr(q)  # orthonormal, zero-mean columns
    pcs = q * np.sqrt(39)
    harmonics = np.stack([_real_harmonic(l, m, lat, lon) for l, m in DEGREES])
    values = np.einsum("tk,k,kyx->tyx", pcs, AMPLITUDES, harmonics)
    field = xr.DataArray(values, dims=("time", "lat", "lon"), coords={"time": np.arange(40), "lat": lat, "lon": lon})
    return field, harmonics


@pytest.mark.parametrize("how", ["coslat", "cell_area"])
def test_weighted_decomposition_recovers_spherical_harmonics(harmonic_field, how):
    field, harmonics = harmonic_field
    modes, _, _ = solve(field, area_weights(field["lat"], field["lon"], how), 3, 0.0)
    expected = AMPLITUDES**2 / np.sum(AMPLITUDES**2)
    np.testing.assert_allclose(modes["variance_explained"].values, expected, atol=1e-4)
    w = np.sqrt(np.cos(np.deg2rad(field["lat"].values)))[:, None]
    for k in range(3):
        a, b = (modes["eof"].values[k] * w).ravel(), (harmonics[k] * w).ravel()
        assert abs(np.corrcoef(a, b)[0, 1]) > 0.9999


def test_without_weighting_the_harmonics_are_not_recovered(harmonic_field):
    field, harmonics = harmonic_field
    modes, _, _ = solve(field, area_weights(field["lat"], field["lon"], "none"), 3, 0.0)
    expected = AMPLITUDES**2 / np.sum(AMPLITUDES**2)
    assert np.max(np.abs(modes["variance_explained"].values - expected)) > 0.01
    w = np.sqrt(np.cos(np.deg2rad(field["lat"].values)))[:, None]
    worst = min(abs(np.corrcoef((modes["eof"].values[k] * w).ravel(), (harmonics[k] * w).ravel())[0, 1])
                for k in range(3))
    assert worst < 0.99


def test_cell_area_of_a_regular_grid_is_exact():
    """Spherical geometry: a band between latitudes a and b covers 2 pi R^2 (sin b - sin a)."""
    lat = np.arange(-89.5, 90, 1.0)
    fraction = cell_area_fraction(lat)
    band = np.deg2rad(1.0)
    total = np.sum(fraction * band) * 2 * np.pi  # sum over a full circle of longitudes
    np.testing.assert_allclose(total, 4 * np.pi, rtol=1e-12)
    np.testing.assert_allclose(fraction, np.cos(np.deg2rad(lat)), rtol=1e-4)  # ~cos(lat) near the centre
    np.testing.assert_allclose(cell_area_fraction(lat[::-1]), fraction[::-1])  # orientation does not matter


def test_usable_points_rule():
    fraction = np.array([0.0, 0.05, 0.1, 0.2, 1.0])
    np.testing.assert_array_equal(usable_points(fraction, 0.1), [True, True, True, False, False])
    np.testing.assert_array_equal(usable_points(fraction, 0.0), [True, False, False, False, False])
