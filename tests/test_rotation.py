"""Varimax rotation of the kept modes, against the factor_analyzer package and the algebra of rotations.

References: Kaiser (1958, Psychometrika 23, 187-200, pages from memory) for the varimax criterion; the
``factor_analyzer`` package's ``Rotator(method="varimax")`` (an independent implementation) on the same
loading matrix; the algebra of orthogonal rotations (``P E^T = (P R)(E R)^T``, lengths kept) for the rest.
"""

import numpy as np
import pytest
import xarray as xr
from factor_analyzer.rotator import Rotator

from climodes.rotation import varimax
from conftest import field_dataset, red_field, write_config


def _criterion(loadings: np.ndarray) -> float:
    """Kaiser's (1958) raw varimax criterion, written out: the variance of each column's squared loadings."""
    squared = loadings**2
    return float(np.sum(np.mean(squared**2, axis=0) - np.mean(squared, axis=0) ** 2))


@pytest.fixture(scope="module")
def rotated_run(tmp_path_factory):
    """A run of four modes with modes.rotate: varimax, on a field with land and a dropped gappy point."""
    from climodes.cli import main

    tmp_path = tmp_path_factory.mktemp("rotated")
    lat, lon = np.arange(-70.0, 75, 10), np.arange(0, 360.0, 15)
    values = red_field((90, lat.size, lon.size), 8) + 0.4 * red_field((90, lat.size, lon.size), 9)
    values[:, 2:4, 5:9] = np.nan
    values[::2, 7, 3] = np.nan
    field_dataset(values, lat, lon).to_netcdf(tmp_path / "field.nc")
    config = write_config(tmp_path, [tmp_path / "field.nc"], modes={"count": 4, "rotate": "varimax"})
    assert main(["run", "--quiet", str(config)]) == 0
    return xr.load_dataset(tmp_path / "out" / "modes.nc")


def _loadings(ds: xr.Dataset, name: str) -> np.ndarray:
    """``area_weight * name`` at the used points, as a (point, mode) matrix."""
    used = ds["point_status"].values == 2
    return (ds[name].values * ds["area_weight"].values)[:, used].T


def test_varimax_matches_factor_analyzer(rotated_run):
    """The same loading matrix (the run's area_weight * eof) rotated by factor_analyzer's varimax without
    Kaiser normalisation gives the run's rotated loadings to 1e-8, up to the order and sign of the columns
    (which the criterion leaves free).  factor_analyzer is told to run all its iterations (tol=-1), so that
    both are converged to rounding rather than to a tolerance on the criterion."""
    loadings = _loadings(rotated_run, "eof")
    reference = Rotator(method="varimax", normalize=False, max_iter=5000, tol=-1).fit_transform(loadings)
    reference = reference[:, np.argsort(-np.sum(reference**2, axis=0))]
    found = _loadings(rotated_run, "rotated_eof")
    reference *= np.sign(np.sum(reference * found, axis=0))
    np.testing.assert_allclose(found, reference, rtol=0, atol=1e-8 * np.abs(loadings).max())
    assert _criterion(found) > _criterion(loadings) + 1e-3  # rotating made the patterns simpler


def test_rotated_modes_rebuild_the_same_field_with_the_same_variance(rotated_run):
    """An orthogonal rotation: the rotated variances sum to the kept modes' variance, the rotated PCs stay
    zero-mean, unit-variance and uncorrelated, and rotated PCs times rotated maps are the unrotated ones'."""
    ds = rotated_run
    np.testing.assert_allclose(ds["rotated_variance_explained"].sum(), ds["variance_explained"].sum(), rtol=1e-10)
    assert (np.diff(ds["rotated_variance_explained"].values) <= 0).all()  # ordered by variance
    np.testing.assert_allclose(np.cov(ds["rotated_pc"].values), np.eye(4), atol=1e-10)
    np.testing.assert_allclose(ds["rotated_pc"].mean("time"), 0, atol=1e-12)
    used = ds["point_status"].values == 2
    field = np.einsum("kt,kyx->tyx", ds["pc"].values, ds["eof"].values)[:, used]
    rotated = np.einsum("kt,kyx->tyx", ds["rotated_pc"].values, ds["rotated_eof"].values)[:, used]
    np.testing.assert_allclose(rotated, field, rtol=0, atol=1e-10 * np.abs(field).max())
    assert np.isnan(ds["rotated_eof"].values[:, ~used]).all()
    top = np.nanargmax(np.abs(ds["rotated_eof"].values.reshape(4, -1)), axis=1)
    assert (ds["rotated_eof"].values.reshape(4, -1)[range(4), top] > 0).all()  # the sign rule


def test_a_rotated_pattern_that_is_already_simple_is_left_alone():
    """Loadings with each point on one column only are a maximum of the criterion (Kaiser 1958): no rotation;
    turned by 30 degrees, they are turned back."""
    simple = np.array([[2.0, 0.0], [1.5, 0.0], [0.0, 1.0], [0.0, 0.5]])
    np.testing.assert_allclose(simple @ varimax(simple)[0], simple, atol=1e-12)
    c, s = np.cos(np.pi / 6), np.sin(np.pi / 6)
    turned = simple @ np.array([[c, -s], [s, c]])
    rotation, converged = varimax(turned)
    assert converged
    np.testing.assert_allclose(np.abs(turned @ rotation), simple, atol=1e-12)
    np.testing.assert_allclose(rotation.T @ rotation, np.eye(2), atol=1e-14)


def test_no_rotation_unless_asked(tmp_path, cli, small_field):
    assert cli("run", write_config(tmp_path, [small_field], modes={"count": 2}))[0] == 0
    ds = xr.open_dataset(tmp_path / "out" / "modes.nc")
    assert not {"rotated_eof", "rotated_pc", "rotated_variance_explained"} & set(ds.data_vars)
