"""An interrupted run leaves nothing under the final name; inputs are never changed (POSIX signals:
SIGINT, SIGTERM, and SIGKILL, which no program can catch).  A caught signal also removes the run's
staging folder and claim; after a SIGKILL they stay until the next run into that folder removes them."""

import hashlib
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from climodes.output import read_mark
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


@pytest.mark.parametrize("sig, code", [(signal.SIGINT, 130), (signal.SIGTERM, 143), (signal.SIGKILL, -9)])
def test_interrupted_while_writing(slow_run, sig, code):
    folder, source, config = slow_run
    before = _digest(source)
    # SIGINT as a terminal delivers it, even where the suite itself runs with SIGINT ignored (a background job)
    proc = subprocess.Popen([sys.executable, "-m", "climodes", "run", str(config)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    deadline = time.monotonic() + 120
    while not list(folder.glob(".out.climodes-stage-*/modes.nc")) and proc.poll() is None \
            and time.monotonic() < deadline:
        time.sleep(0.005)  # wait until the results are being written: the riskiest moment
    assert proc.poll() is None, "the run ended before it could be interrupted"
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=120)
    if proc.returncode == 0 and sig != signal.SIGKILL:
        # on a loaded machine the signal can come while the finished results are moved into place: it is
        # then held and dropped, and the results are complete (output.py, _signals_held)
        assert read_mark(folder / "out") is not None and not list(folder.glob(".out*")), err
        return
    assert proc.returncode == code, err
    assert not (folder / "out").exists()  # nothing under the final name
    if sig != signal.SIGKILL:  # a caught signal cleans up its staging folder and claim too
        word = "interrupted" if sig == signal.SIGINT else "stopped"
        assert not list(folder.glob(".out*")) and f"{word}; no results were written" in err
        assert "Traceback" not in err
    else:  # what a SIGKILL leaves: the claim and the staging folder, both naming the dead run
        stage, = folder.glob(".out.climodes-stage-*")
        assert (folder / ".out.climodes-claim").exists()
        again = subprocess.run([sys.executable, "-m", "climodes", "run", str(config)], capture_output=True,
                               text=True, timeout=300)
        assert again.returncode == 0, again.stderr
        assert f"note: removed {stage}, left by a run (pid {proc.pid}) that was killed" in again.stderr
        assert sorted(p.name for p in folder.glob(".out*")) == []  # the next run removed them
        assert (folder / "out" / "modes.nc").exists()
    assert _digest(source) == before


def test_a_script_that_turns_sigterm_into_an_exit_leaves_no_scratch(slow_run, tmp_path):
    """Python ends a script at once on SIGTERM unless it handles the signal (the Python documentation, module
    signal); one that turns SIGTERM into ``sys.exit`` as the README advises lets climodes remove its
    temporary folder, as the command line does."""
    folder, _, config = slow_run
    scratch = tmp_path / "tmp"
    scratch.mkdir()
    script = folder / "script.py"
    script.write_text("import signal, sys\nimport climodes\n"
                      "signal.signal(signal.SIGTERM, lambda *_: sys.exit(143))\n"
                      f"climodes.run({str(config)!r})\n")
    proc = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env={**os.environ, "TMPDIR": str(scratch)})
    deadline = time.monotonic() + 120
    while not list(scratch.glob("climodes-*")) and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.005)
    assert proc.poll() is None, "the run ended before it could be stopped"
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode == 143, err
    assert list(scratch.iterdir()) == [] and not (folder / "out").exists()
