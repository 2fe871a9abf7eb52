"""The demo end to end: planted modes recovered, the same modes as the eofs package, figures
drawn with the network unreachable."""

import socket

import numpy as np
import pytest
import xarray as xr
from eofs.standard import Eof

from climodes.cli import main
from climodes.config import load_spec
from climodes.demo import scenario, write_demo_fields
from climodes.fields import open_field, select
from climodes.prepare import prepare
from climodes.weights import area_weights
from conftest import cf_strict

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    """Run the shipped demo config on freshly generated files, with every socket refused."""
    root = tmp_path_factory.mktemp("demo")
    write_demo_fields(root / "demo_fields")
    (root / "configs").mkdir()
    config = root / "configs" / "demo.yaml"
    text = open("configs/demo.yaml").read()
    config.write_text(text)

    def no_network(*args, **kwargs):
        raise OSError("network is off in this test")

    real = socket.socket.connect
    socket.socket.connect = no_network
    try:
        assert main(["run", "--quiet", str(config)]) == 0
    finally:
        socket.socket.connect = real
    return root, config


def test_demo_recovers_the_planted_modes(demo_run):
    root, _ = demo_run
    found = xr.open_dataset(root / "results" / "demo" / "modes.nc")
    truth = xr.open_dataset(root / "demo_fields" / "planted_modes.nc")
    w = np.sqrt(np.cos(np.deg2rad(found["lat"]))).broadcast_like(found["eof"].isel(mode=0))
    for k in range(3):
        planted = truth["eof"].isel(mode=k).sel(lat=found["lat"], lon=found["lon"])
        recovered = found["eof"].isel(mode=k)
        both = planted.notnull() & recovered.notnull()
        a, b = (planted * w).where(both), (recovered * w).where(both)
        r = float((a * b).sum() / np.sqrt((a**2).sum() * (b**2).sum()))
        assert abs(r) > 0.97, (k, r)  # analytic truth of the scenario: planted = amplitude x pattern
        np.testing.assert_allclose(float(found["eigenvalue"][k]), float(truth["eigenvalue"][k]), rtol=0.08)
    assert found["separated"].values[:3].all() and not found["separated"].values[3:].any()
    # the planted modes stand above the red noise they were planted in; the two after them are that noise
    assert found["significant"].values.tolist() == [1, 1, 1, 0, 0]
    # each mode's own N*: N (1 - r^2) / (1 + r^2) with r the lag-1 autocorrelation of the planted PC
    # (Bretherton et al. 1999; r by numpy's corrcoef; 10 % for the noise mixed into the recovered PCs)
    r = np.array([np.corrcoef(pc[1:], pc[:-1])[0, 1] for pc in truth["pc"].values])
    np.testing.assert_allclose(found["effective_sample_size"].values[:3], 600 * (1 - r**2) / (1 + r**2), rtol=0.1)


def test_demo_matches_the_eofs_package(demo_run):
    """eofs on the same prepared anomalies: variance fractions to 1e-6, patterns and PCs r >= 0.99999."""
    root, config = demo_run
    spec = load_spec(config)
    # in float64, as the solvers prepare the field they read
    field = select(open_field(spec.input), spec.select).astype(np.float64)
    anomaly = prepare(field, spec.prepare, None, []).load()
    found = xr.open_dataset(root / "results" / "demo" / "modes.nc")
    # eofs needs points missing at every step or never; take the points climodes kept
    keep = found["eof"].isel(mode=0).notnull().values
    values = np.where(keep, anomaly.fillna(0).values, np.nan)
    weights = area_weights(anomaly["lat"], anomaly["lon"], "coslat").values
    ref = Eof(values, weights=weights, center=True, ddof=1)
    np.testing.assert_allclose(found["variance_explained"].values[:3], ref.varianceFraction(3), atol=1e-6)
    maps = ref.eofsAsCovariance(neofs=3, pcscaling=1)
    pcs = ref.pcs(npcs=3, pcscaling=1)
    for k in range(3):
        ours = found["eof"].values[k][keep]
        assert abs(np.corrcoef(ours, maps[k][keep])[0, 1]) >= 0.99999
        assert abs(np.corrcoef(found["pc"].values[k], pcs[:, k])[0, 1]) >= 0.99999
        # our sign rule, applied by hand to eofs' map: its largest absolute value is positive
        theirs = maps[k][keep]
        sign = np.sign(theirs[np.argmax(np.abs(theirs))])
        np.testing.assert_allclose(ours, sign * theirs, rtol=1e-5, atol=1e-8)


def test_demo_results_are_cf_compliant(demo_run):
    """IOOS compliance-checker, CF-1.10, strict criteria."""
    root, _ = demo_run
    done = cf_strict(root / "results" / "demo" / "modes.nc")
    assert done.returncode == 0 and "All tests passed!" in done.stdout, done.stdout[-3000:]


def test_demo_figures_exist_and_are_pictures(demo_run):
    root, _ = demo_run
    folder = root / "results" / "demo"
    names = sorted(p.name for p in (folder / "figures").iterdir())
    assert names == sorted([f"mode_0{k}.png" for k in range(1, 6)] + [f"pc_0{k}.png" for k in range(1, 6)]
                           + ["pairs.png", "spectrum.png", "residuals.png"])
    for p in (folder / "figures").iterdir():
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and p.stat().st_size > 10_000
    assert (folder / "report.html").stat().st_size > 100_000


def test_the_later_decade_projects_onto_the_demo_modes(demo_run):
    """configs/demo_later.yaml: the later decade, made of the same planted patterns with new series, projected
    onto the demo's modes gives pseudo-PCs that follow the planted series (planted truth; as closely as the
    run's own PCs follow the first fifty years', 0.98 to 0.998 in the README)."""
    root, _ = demo_run
    (root / "configs" / "demo_later.yaml").write_text(open("configs/demo_later.yaml").read())
    assert main(["project", "--quiet", str(root / "results" / "demo"), str(root / "configs" / "demo_later.yaml")]) == 0
    projection = xr.open_dataset(root / "results" / "demo_later" / "projection.nc")
    truth = xr.open_dataset(root / "demo_fields" / "later_planted_modes.nc")
    for k in range(3):
        assert abs(np.corrcoef(projection["pc"].values[k], truth["pc"].values[k])[0, 1]) > 0.98
    assert cf_strict(root / "results" / "demo_later" / "projection.nc").returncode == 0


def test_demo_files_are_reproducible(tmp_path):
    one, _ = scenario()
    two, _ = scenario()
    xr.testing.assert_identical(one, two)
    written = write_demo_fields(tmp_path)
    total = sum(p.stat().st_size for p in written)
    assert total < 6_000_000  # a few MB at most
