"""Against a real SLURM: worker jobs, `climodes submit`, refusals and lost workers.

The single-node SLURM of the `slurm` fixture (tests/slurm_node.py) is started once per test session;
where it cannot start (not root, packages missing) these tests skip and say why.  References: the
threaded scheduler's results (see test_cluster.py), and SLURM's own record of each job (squeue).
"""

import os
import re
import time

import pytest
import xarray as xr

from test_cluster import _kill_during_first_pass, many_files, run_config, same_modes
from conftest import write_config

pytestmark = [pytest.mark.slow, pytest.mark.usefixtures("fresh_process")]

# two worker jobs of one core on a node of two: the plan sees one worker per job, as the threads run
# with one worker, so the blocks and their sums are the same
WORKERS = {"scheduler": "slurm", "jobs": 2, "job_cores": 1, "job_memory": "1GB", "memory": "1GB",
           "interface": "lo", "worker_wait": 60}


def _worker_jobs(slurm) -> dict[str, str]:
    out = slurm.run("squeue", "-h", "-t", "all", "-n", "climodes-worker", "-o", "%i %T").stdout
    return dict(line.split() for line in out.splitlines())


@pytest.mark.parametrize("method", ["gram", "randomized"])
def test_slurm_worker_jobs_give_the_same_modes_as_threads(tmp_path, cli, slurm, method):
    """Same blocks, same pairwise sums: 1e-8 for gram (float64 products); randomized with the same seed
    within the 1e-6 stated for its float32 products (see test_cluster.py)."""
    paths = many_files(tmp_path)
    common = dict(modes={"count": 3, "method": method, "seed": 2}, prepare={"detrend": "linear", "max_missing": 0.3})
    threads = run_config(cli, tmp_path / "threads", paths, compute={"scheduler": "threads", "workers": 1}, **common)
    before = set(_worker_jobs(slurm))
    batch = run_config(cli, tmp_path / "slurm", paths, compute=WORKERS, **common)
    same_modes(batch, threads, 1e-8 if method == "gram" else 1e-6)
    jobs = {job: state for job, state in _worker_jobs(slurm).items() if job not in before}
    assert len(jobs) == 2 and not {"PENDING", "RUNNING"} & set(jobs.values()), jobs  # ended with the run
    assert batch.attrs["climodes_compute"].startswith(
        f"slurm: 2 of 2 worker jobs ({', '.join(sorted(jobs))}) of 1 cores and 1GB each, dask scheduler on ")
    assert not [p for p in (tmp_path / "slurm").iterdir() if p.name.startswith(".")]  # worker logs removed


def test_submit_wait_runs_a_config_and_returns_the_jobs_exit_status(tmp_path, cli, slurm):
    paths = many_files(tmp_path)
    config = write_config(tmp_path, paths, modes={"count": 3}, compute={"workers": 1, "memory": "1GB"})
    code, out, err = cli("submit", "--wait", config)
    assert code == 0, err
    job = err.split("submitted SLURM job ")[1].split()[0]
    assert out == config.with_name("run.sbatch").read_text()
    assert f"SLURM job {job} ended with exit status 0" in err
    number, unit = re.search(r"#SBATCH --mem=(\d+)([MG])", out).groups()
    asked = int(number) * 2 ** (30 if unit == "G" else 20)
    assert xr.open_dataset(tmp_path / "out" / "modes.nc").attrs["climodes_compute"].endswith(
        f"in SLURM job {job} (1 cores, {asked / 1e9:.2f} GB)")  # what the job asked for
    assert (tmp_path / f"run-{job}.log").read_text() == ""  # --quiet: nothing but errors

    # a run that fails once it reads the data (an infinite value): the job's status, and its one-line error
    bad = tmp_path / "bad"
    bad.mkdir()
    broken = many_files(bad)
    with xr.open_dataset(broken[0]) as ds:
        values = ds.load()
    values["tas"][3, 4, 5] = float("inf")
    values.to_netcdf(broken[0])
    config = write_config(bad, broken, modes={"count": 3}, compute={"workers": 1, "memory": "1GB"})
    code, _, err = cli("submit", "--wait", config)
    job = err.split("submitted SLURM job ")[1].split()[0]
    assert code == 2 and f"SLURM job {job} ended with exit status 2" in err
    log = (bad / f"run-{job}.log").read_text()
    assert log.startswith("climodes: error: input.variable: the field holds infinite") and log.count("\n") == 1
    assert not (bad / "out").exists()


def test_an_oversized_request_fails_fast(tmp_path, cli, slurm):
    paths = many_files(tmp_path)
    config = write_config(tmp_path, paths, modes={"count": 3}, compute={**WORKERS, "job_memory": "100000GB"})
    start = time.monotonic()
    code, out, err = cli("run", config)
    assert time.monotonic() - start < 30
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert "compute: SLURM refused the worker jobs (Requested node configuration is not available)" in err
    assert not (tmp_path / "out").exists() and not [p for p in tmp_path.iterdir() if p.name.startswith(".")]
    assert not any(state in ("PENDING", "RUNNING") for state in _worker_jobs(slurm).values())

    config = write_config(tmp_path, paths, modes={"count": 3},
                          compute={"workers": 1, "directives": ["--mem=100000G"]})  # more memory than the node
    code, out, err = cli("submit", config)
    assert code == 2 and err.strip().splitlines()[-1] == (
        "climodes: error: SLURM refused the batch job: Requested node configuration is not available; ask for less "
        "under compute: (workers, memory, walltime) or choose compute.queue")


def _cancel(slurm, killed):
    def kill(client, address):
        job = client.run(lambda: os.environ["SLURM_JOB_ID"], workers=[address])[address]
        slurm.run("scancel", job)
        killed.append(job)

    return kill


def test_a_worker_job_cancelled_mid_run_is_survived(tmp_path, cli, slurm, monkeypatch):
    """One of the two worker jobs is cancelled while it works on a block: dask computes its blocks again on
    the other, and the modes are those of an undisturbed run to 1e-8."""
    paths = many_files(tmp_path, steps=1000, nlat=40, nlon=72)
    common = dict(modes={"count": 3, "method": "gram"})
    threads = run_config(cli, tmp_path / "threads", paths, compute={"scheduler": "threads", "workers": 1}, **common)
    killed = []
    watcher = _kill_during_first_pass(monkeypatch, _cancel(slurm, killed))
    batch = run_config(cli, tmp_path / "slurm", paths, compute=WORKERS, **common)
    watcher[0].join(5)
    assert len(killed) == 1 and _worker_jobs(slurm)[killed[0]] in ("CANCELLED", "COMPLETING")
    same_modes(batch, threads, 1e-8)


def test_losing_every_worker_job_ends_the_run_clearly(tmp_path, cli, slurm, monkeypatch):
    """Both worker jobs cancelled mid-run, none comes back within compute.worker_wait: one line, exit 2, and
    no results folder."""
    paths = many_files(tmp_path, steps=1000, nlat=40, nlon=72)
    killed = []
    cancel = _cancel(slurm, killed)

    def cancel_all(client, address):
        for worker in list(client.nthreads()):
            cancel(client, worker)

    _kill_during_first_pass(monkeypatch, cancel_all)
    config = write_config(tmp_path, paths, modes={"count": 3, "method": "gram"},
                          compute={**WORKERS, "worker_wait": 5})
    code, _, err = cli("run", config)
    assert len(killed) == 2
    assert code == 2 and len(err.strip().splitlines()) == 1, err
    assert "compute.worker_wait: the run lost its dask workers and none came back within 5s" in err
    assert not (tmp_path / "out").exists() and not [p for p in tmp_path.iterdir() if p.name.startswith(".")]
