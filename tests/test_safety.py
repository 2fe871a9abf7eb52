"""An interrupted run leaves nothing under the final name; inputs are never changed (POSIX signals:
SIGINT, SIGTERM, and SIGKILL, which no program can catch)."""

import hashlib
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from conftest import field_dataset, red_field, write_config

pytestmark = pytest.mark.slow


@pytest.fixture
def slow_run(tmp_path):
    lat = np.arange(-80.0, 81, 4)
    lon = np.arange(0.0, 360, 4)
    path = tmp_path / "field.nc"
    field_dataset(red_field((240, lat.size, lon.size), 4).astype(np.float32), lat, lon).to_netcdf(path)
    config = write_config(tmp_path, [path], modes={"count": 8}, output={"figures": True})
    return tmp_path, path, config


def _digest(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.mark.parametrize("sig, code", [(signal.SIGINT, 130), (signal.SIGTERM, 130), (signal.SIGKILL, -9)])
def test_interrupted_while_writing(slow_run, sig, code):
    folder, source, config = slow_run
    before = _digest(source)
    proc = subprocess.Popen([sys.executable, "-m", "climodes", "run", str(config)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while not list(folder.glob(".out.partial-*")) and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.005)  # wait until the results are being written: the riskiest moment
    assert proc.poll() is None, "the run ended before it could be interrupted"
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == code
    assert not (folder / "out").exists()  # nothing under the final name
    if sig != signal.SIGKILL:  # a caught signal cleans up its staging folder too
        assert not list(folder.glob(".out*")) and "interrupted; no results were written" in err
        assert "Traceback" not in err
    assert _digest(source) == before
