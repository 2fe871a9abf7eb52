"""Where dask runs: threads, a local dask cluster, batch allocations, and the batch scripts of `climodes submit`.

References: the exact LAPACK solver and the threaded scheduler (checked against eofs and scikit-learn in
test_solvers.py) for the results; the SLURM sbatch and PBS Professional manuals (from memory) for the
variables a job's environment holds and for the script directives; bash's own parser for the scripts.
The tests against a real SLURM are in test_slurm.py.
"""

import os
import re
import signal
import subprocess
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml

import climodes.cluster
from climodes.cluster import (
    Allocation,
    batch_allocation,
    capacity,
    estimated_seconds,
    estimated_walltime,
    run_memory,
    worker_count,
)
from climodes.config import ComputeSection
from conftest import field_dataset, red_field, write_config


def many_files(folder: Path, steps: int = 240, nlat: int = 32, nlon: int = 48, files: int = 3, seed: int = 5,
               gap: bool = True) -> list[Path]:
    """A float32 field split over ``files`` files along time, land at some points and a gappy point."""
    lat = np.linspace(-77.5, 77.5, nlat)
    lon = np.arange(0, 360, 360 / nlon)
    values = red_field((steps, nlat, nlon), seed).astype(np.float32)
    values[:, 3:6, 4:9] = np.nan  # land
    if gap:
        values[::7, nlat // 2, nlon // 2] = np.nan  # a gappy point, filled
    time_axis = pd.date_range("1901-01-15", periods=steps, freq="MS") + pd.Timedelta(days=14)
    ds = field_dataset(values, lat, lon, time=time_axis)
    per = -(-steps // files)
    paths = []
    for i in range(files):
        path = folder / f"part{i}.nc"
        ds.isel(time=slice(i * per, (i + 1) * per)).to_netcdf(path)
        paths.append(path)
    return paths


def same_modes(a: xr.Dataset, b: xr.Dataset, rtol: float) -> None:
    np.testing.assert_allclose(a["eigenvalue"], b["eigenvalue"], rtol=rtol)
    np.testing.assert_allclose(a["variance_explained"], b["variance_explained"], rtol=rtol)
    scale = np.nanmax(np.abs(b["eof"].values))
    np.testing.assert_allclose(a["eof"].values, b["eof"].values, rtol=0, atol=rtol * scale)
    np.testing.assert_allclose(a["pc"].values, b["pc"].values, rtol=0, atol=rtol * 10)


def run_config(cli, folder: Path, paths, **sections) -> xr.Dataset:
    folder.mkdir(exist_ok=True)
    code, _, err = cli("run", write_config(folder, paths, **sections))
    assert code == 0, err
    return xr.open_dataset(folder / "out" / "modes.nc")


# --- batch allocations (sbatch's and PBS's output environment variables, from memory)


@pytest.mark.parametrize("environ, expected", [
    ({"SLURM_JOB_ID": "77", "SLURM_CPUS_PER_TASK": "8", "SLURM_CPUS_ON_NODE": "32", "SLURM_MEM_PER_NODE": "16384"},
     Allocation("SLURM", "77", 8, 16384 * 2**20)),
    ({"SLURM_JOB_ID": "78", "SLURM_CPUS_ON_NODE": "4", "SLURM_MEM_PER_CPU": "1000"},
     Allocation("SLURM", "78", 4, 4000 * 2**20)),
    ({"PBS_JOBID": "12.server", "NCPUS": "6"}, Allocation("PBS", "12.server", 6, None)),
    ({"PBS_JOBID": "13.server", "PBS_NUM_PPN": "3"}, Allocation("PBS", "13.server", 3, None)),
    ({"HOME": "/home/a"}, None),
])
def test_the_allocation_comes_from_the_job_environment(monkeypatch, environ, expected):
    monkeypatch.setattr(climodes.cluster, "_cgroup_memory", lambda: None)
    assert batch_allocation(environ) == expected


def test_a_local_cluster_plans_each_workers_interpreter_and_library_work(monkeypatch):
    """Each worker process holds an interpreter and libraries like this one's, and its libraries allocate
    while it reads as this process's do (measured: a cluster of 2 workers went 20-70 MB past a 1GB budget
    when only its interpreters were counted): the plan starts from both, for every worker."""
    from climodes.solvers import LIBRARY_WORK

    monkeypatch.setattr(climodes.cluster, "resident_bytes", lambda: int(150e6))
    threads = capacity(ComputeSection(memory="1GB", workers=2))
    processes = capacity(ComputeSection(memory="1GB", scheduler="processes", workers=2))
    assert threads.in_use == 150e6
    assert processes.in_use == 3 * 150e6 + 2 * LIBRARY_WORK and LIBRARY_WORK >= 50e6


def test_inside_an_allocation_auto_means_its_cores_and_memory(monkeypatch):
    monkeypatch.setenv("SLURM_JOB_ID", "99")
    monkeypatch.setenv("SLURM_CPUS_PER_TASK", "1")
    monkeypatch.setenv("SLURM_MEM_PER_NODE", "600")
    spec = ComputeSection(memory="4GB")
    assert worker_count(spec) == 1
    assert run_memory(spec) == 600 * 2**20
    assert capacity(spec).memory == 600 * 2**20 and capacity(spec).workers == 1
    assert run_memory(ComputeSection(memory="200MB")) == 200e6  # never more than compute.memory
    assert worker_count(ComputeSection(workers=3)) == 3  # a number is taken as given


def test_a_run_inside_an_allocation_says_so(tmp_path, cli, monkeypatch):
    monkeypatch.setenv("SLURM_JOB_ID", "99")
    monkeypatch.setenv("SLURM_CPUS_PER_TASK", "1")
    monkeypatch.setenv("SLURM_MEM_PER_NODE", "900")
    ds = run_config(cli, tmp_path / "a", many_files(tmp_path), modes={"count": 3, "method": "gram"})
    assert ds.attrs["climodes_compute"].startswith("threads: 1 worker thread(s) on ")
    assert ds.attrs["climodes_compute"].endswith(", in SLURM job 99 (1 cores, 0.94 GB)")
    log = (tmp_path / "a" / "out" / "run.log").read_text()
    assert "within compute.memory 0.94 GB" in log and f"compute: {ds.attrs['climodes_compute']}" in log


# --- batch scripts


def test_walltime_estimate():
    """Hand-computed from the stated rule: 2 x (passes x bytes / 50 MB/s + operations / (1e9/s x cores)) + 600 s,
    rounded up to 10 minutes."""
    # gram, 720 x 65160 float32, 10 modes, 4 cores: reads 2 * 720 * 65160 * 4 / 5e7 = 7.506 s, operations
    # 2 * 720^2 * 65160 + 2 * 720 * 65160 * 10 = 6.849e10 -> 17.12 s; 2 * 24.63 + 600 = 649.3 s -> 20 minutes
    assert estimated_seconds("gram", (720, 181, 360), 10, 4, 4) == pytest.approx(649.25, rel=1e-4)
    assert estimated_walltime("gram", (720, 181, 360), 10, 4, 4) == "00:20:00"
    # randomized, 3650 x 259920, 5 passes: reads 5 * 3.7948e9 / 5e7 = 379.5 s, operations 5 * 4 * 3650 * 259920 * 20
    # = 3.795e11 -> 47.43 s on 8 cores; 2 * 426.9 + 600 = 1453.8 s -> 30 minutes
    assert estimated_seconds("randomized", (3650, 361, 720), 10, 4, 8) == pytest.approx(1453.8, rel=1e-4)
    assert estimated_walltime("randomized", (3650, 361, 720), 10, 4, 8) == "00:30:00"
    # exact, 600 x 1421 float64: reads 600 * 1421 * 8 / 5e7 = 0.1364 s, operations 4 * 600 * 1421 * 600 = 2.046e9
    # -> 0.5116 s on 4 cores; 2 * 0.648 + 600 = 601.3 s -> 20 minutes
    assert estimated_seconds("exact", (600, 29, 49), 5, 8, 4) == pytest.approx(601.296, rel=1e-4)
    assert estimated_walltime("exact", (600, 29, 49), 5, 8, 4) == "00:20:00"
    assert estimated_walltime("gram", (2000, 721, 1440), 10, 4, 1) == "05:00:00"  # 17958 s


@pytest.mark.parametrize("shape", [(120, 20, 30), (720, 181, 360), (1500, 361, 720), (3650, 361, 720), (2000, 64, 128)])
def test_the_memory_asked_for_keeps_the_plan(shape):
    """A batch job gets the memory its plan needs and plans again with only that much: auto must take the
    same solver, and the blocks must still fit (our own contract: compute.memory and climodes submit)."""
    from climodes.solvers import plan_solver

    first = plan_solver(shape, 10, "auto", int(4e9), 4, in_use=int(2e8))
    again = plan_solver(shape, 10, "auto", first.memory, 4, in_use=int(2e8))
    assert again.method == first.method and first.memory <= 4e9


def _submit_config(tmp_path, **compute):
    folder = tmp_path / "job"
    folder.mkdir()
    paths = many_files(folder)
    return write_config(folder, paths, modes={"count": 3}, compute={"workers": 2, "memory": "2GB", **compute})


def test_dry_run_writes_and_prints_a_slurm_script(tmp_path, cli, fresh_process):
    config = _submit_config(tmp_path, queue="short", account="proj1", directives=["--qos=low", "--mail-type=END"])
    code, out, err = cli("submit", "--dry-run", "--system", "slurm", config)
    assert code == 0, err
    script = config.with_name("run.sbatch")
    assert out == script.read_text()
    assert err.strip() == f"climodes: wrote {script}; not submitted (--dry-run)"
    directives = [line.split(None, 1)[1] for line in out.splitlines() if line.startswith("#SBATCH ")]
    assert directives == ["--job-name=climodes-run", "--nodes=1", "--ntasks=1", "--cpus-per-task=2", "--mem=512M",
                          "--time=00:20:00", f"--output={config.parent}/run-%j.log", "--partition=short",
                          "--account=proj1", "--qos=low", "--mail-type=END"]
    assert out.splitlines()[-1].endswith(f"-m climodes run --quiet {config}")
    assert subprocess.run(["bash", "-n", str(script)]).returncode == 0  # bash parses it
    assert os.access(script, os.X_OK)
    assert not (config.parent / "out").exists()  # nothing ran


def test_dry_run_writes_a_pbs_script(tmp_path, cli, fresh_process):
    config = _submit_config(tmp_path, queue="short", account="proj1", walltime="05:00:00")
    code, out, err = cli("submit", "--dry-run", "--system", "pbs", config)
    assert code == 0, err
    assert out == config.with_name("run.pbs").read_text()
    directives = [line.split(None, 1)[1] for line in out.splitlines() if line.startswith("#PBS ")]
    assert directives == ["-N climodes-run", "-l select=1:ncpus=2:mem=512mb", "-l walltime=05:00:00", "-j oe",
                          f"-o {config.parent}/", "-q short", "-A proj1"]


def test_the_job_asks_for_what_the_plan_needs(tmp_path, cli, fresh_process):
    """The memory request follows the field and the solver: a bigger field that the gram solver streams
    asks for more than a small one, never more than compute.memory allows the plan."""
    small = _submit_config(tmp_path)
    code, out, _ = cli("submit", "--dry-run", "--system", "slurm", small)
    assert code == 0 and "--mem=512M" in out and "exact solver" in out
    folder = tmp_path / "big"
    folder.mkdir()
    big = write_config(folder, many_files(folder, steps=2400, nlat=32, nlon=64, files=2),
                       modes={"count": 3, "method": "gram"}, compute={"workers": 2, "memory": "1GB"})
    code, out, err = cli("submit", "--dry-run", "--system", "slurm", big)
    assert code == 0, err
    number, unit = re.search(r"--mem=(\d+)([MG])", out).groups()
    mem = int(number) * (1024 if unit == "G" else 1)  # MiB
    assert 512 < mem <= 1e9 / 2**20 + 256 and "gram solver" in out


def test_submit_never_replaces_a_script_it_did_not_write(tmp_path, cli):
    config = _submit_config(tmp_path)
    mine = config.with_name("run.sbatch")
    mine.write_text("#!/bin/bash\n# my own job\n")
    code, out, err = cli("submit", "--dry-run", "--system", "slurm", config)
    assert code == 2 and out == "" and len(err.strip().splitlines()) == 1
    assert "was not written by climodes submit; move it away" in err
    assert mine.read_text() == "#!/bin/bash\n# my own job\n"
    mine.unlink()
    assert cli("submit", "--dry-run", "--system", "slurm", config)[0] == 0
    assert cli("submit", "--dry-run", "--system", "slurm", config)[0] == 0  # its own script is replaced


@pytest.mark.parametrize("taken, expected", [
    ("folder", "run.sbatch exists and is not a file (a folder, a link or a device)"),
    ("link", "run.sbatch exists and is not a file (a folder, a link or a device)"),
    ("fifo", "run.sbatch exists and is not a file (a folder, a link or a device)"),
    ("results", "output.dir: {folder}/run.sbatch is where the batch script {folder}/run.sbatch goes"),
    ("inside", "output.dir: {folder}/run.sbatch/out is where the batch script {folder}/run.sbatch goes"),
])
def test_the_script_path_taken_by_something_else(tmp_path, cli, taken, expected):
    """The script's name is a folder, a link (to an input file), a named pipe (reading it would hang),
    or the run's own output.dir (the script would stand where the job's results must go): one line, exit 2,
    nothing written or changed."""
    config = _submit_config(tmp_path)
    script = config.with_name("run.sbatch")
    if taken == "folder":
        script.mkdir()
    elif taken == "link":
        script.symlink_to(next(config.parent.glob("*.nc")))
    elif taken == "fifo":
        os.mkfifo(script)
    else:
        body = yaml.safe_load(config.read_text())
        body["output"]["dir"] = str(script if taken == "results" else script / "out")
        config.write_text(yaml.safe_dump(body))
    before = sorted((p.name, p.is_dir()) for p in config.parent.iterdir())
    code, out, err = cli("submit", "--dry-run", "--system", "slurm", config)
    assert code == 2 and out == "" and len(err.strip().splitlines()) == 1, err
    assert expected.format(folder=config.parent) in err
    assert sorted((p.name, p.is_dir()) for p in config.parent.iterdir()) == before


@pytest.mark.parametrize("system, command", [("slurm", "sbatch"), ("pbs", "qsub")])
def test_submit_without_the_batch_commands(tmp_path, cli, monkeypatch, system, command):
    config = _submit_config(tmp_path)
    monkeypatch.setenv("PATH", str(tmp_path / "empty"))
    code, out, err = cli("submit", "--system", system, config)
    assert code == 2 and out == "" and len(err.strip().splitlines()) == 1
    assert f"{command} ({system.upper()}) is not installed here" in err
    assert not config.with_name("run.sbatch").exists() and not config.with_name("run.pbs").exists()


# --- a local dask cluster (compute.scheduler: processes)


@pytest.mark.slow
@pytest.mark.parametrize("method", ["gram", "randomized"])
def test_a_local_cluster_gives_the_same_modes_as_threads(tmp_path, cli, method):
    """Same blocks, same pairwise sums: 1e-8 for gram (float64 products); randomized with the same seed
    within the 1e-6 stated for its float32 products, whose last bits may differ from one process to another
    (test_streaming.py: any two blockings or thread counts)."""
    paths = many_files(tmp_path)
    common = dict(modes={"count": 3, "method": method, "seed": 4}, prepare={"detrend": "linear", "max_missing": 0.3})
    threads = run_config(cli, tmp_path / "threads", paths, compute={"scheduler": "threads", "workers": 2}, **common)
    local = run_config(cli, tmp_path / "processes", paths, compute={"scheduler": "processes", "workers": 2}, **common)
    same_modes(local, threads, 1e-8 if method == "gram" else 1e-6)
    assert local.attrs["climodes_compute"].startswith("processes: a local dask cluster of 2 worker processes on ")
    assert threads.attrs["climodes_compute"].startswith("threads: 2 worker thread(s) on ")


@pytest.mark.slow
def test_a_local_cluster_reads_and_sums_on_its_workers(tmp_path, cli, values_read):
    """Not one value is read in this process (the counter sees this process only), and what travels between
    processes in each pass is the small products: a few Gram matrices, the maps, far less than the field."""
    paths = many_files(tmp_path, steps=120, nlat=72, nlon=144, files=4, gap=False)
    field_bytes = 120 * 72 * 144 * 4
    run_config(cli, tmp_path / "threads", paths, modes={"count": 3, "method": "gram"},
               compute={"scheduler": "threads", "workers": 2})
    assert values_read["values"] == 120 * 72 * 144  # the counter works: one read here (the field fits memory)
    values_read["values"] = 0
    run_config(cli, tmp_path / "local", paths, modes={"count": 3, "method": "gram"},
               compute={"scheduler": "processes", "workers": 2})
    assert values_read["values"] == 0
    log = (tmp_path / "local" / "out" / "run.log").read_text()
    moved = re.findall(r"moved: (pass \d of 2).*?: ([\d.]+) MB of tasks sent to the workers, ([\d.]+) MB between "
                       r"workers, ([\d.]+) MB of results back", log)
    assert [m[0] for m in moved] == ["pass 1 of 2", "pass 2 of 2"]
    gram_bytes, maps_bytes = 120 * 120 * 8, 72 * 144 * 3 * 8
    (_, sent1, between1, back1), (_, sent2, between2, back2) = [(m[0], *map(float, m[1:])) for m in moved]
    # one Gram sum, and per point the missing fraction, the fitted preparation (12 monthly means, the offset)
    # and the two moments of the prepared series: 16 values
    assert back1 * 1e6 < 2 * gram_bytes + 16 * 72 * 144 * 8 + 1e5
    assert back2 * 1e6 < 1.1 * maps_bytes + 1e5  # the maps
    assert between1 * 1e6 < 16 * gram_bytes + 16 * 72 * 144 * 8  # partial sums and fits only: no block travelled
    assert between2 == 0.0
    assert max(sent1, sent2, back2) * 1e6 < field_bytes / 5  # pass 1's traffic: the bounds above


def _kill_during_first_pass(monkeypatch, kill):
    """Call ``kill(client, worker address)`` once a block is being worked on in the first pass."""
    real = climodes.cluster._served_bytes
    started = []

    def spy(client):
        if not started:
            def watch():
                deadline = time.monotonic() + 60
                while time.monotonic() < deadline:
                    busy = [addr for addr, keys in client.processing().items() if keys]
                    if busy:
                        kill(client, busy[0])
                        return
                    time.sleep(0.02)
            started.append(threading.Thread(target=watch, daemon=True))
            started[0].start()
        return real(client)

    monkeypatch.setattr(climodes.cluster, "_served_bytes", spy)
    return started


@pytest.mark.slow
def test_a_local_cluster_survives_a_killed_worker(tmp_path, cli, monkeypatch):
    """A worker process killed while it works on a block: the nanny starts a new one, dask computes the lost
    blocks again, and the modes are those of an undisturbed run to 1e-8."""
    paths = many_files(tmp_path, steps=1000, nlat=40, nlon=72)
    common = dict(modes={"count": 3, "method": "gram"})
    threads = run_config(cli, tmp_path / "threads", paths, compute={"scheduler": "threads", "workers": 2}, **common)
    killed = []

    def kill(client, address):
        pid = client.run(os.getpid, workers=[address])[address]
        os.kill(pid, signal.SIGKILL)
        killed.append(pid)

    watcher = _kill_during_first_pass(monkeypatch, kill)
    local = run_config(cli, tmp_path / "local", paths, compute={"scheduler": "processes", "workers": 2}, **common)
    watcher[0].join(5)
    assert killed, "no worker was killed"
    same_modes(local, threads, 1e-8)


@pytest.mark.slow
def test_progress_bars_with_a_local_cluster(tmp_path, small_field, capsys, monkeypatch):
    """On a terminal every pass draws its bar to 100 %; with --quiet nothing is drawn (off a terminal neither:
    the same test as with threads, in test_streaming.py)."""
    from climodes.cli import main

    monkeypatch.setattr(climodes.cluster, "PROGRESS_MINIMUM", 0.0)
    monkeypatch.setattr("sys.stderr.isatty", lambda: True, raising=False)
    config = write_config(tmp_path, [small_field], modes={"count": 2, "method": "gram"},
                          compute={"scheduler": "processes", "workers": 2}, output={"overwrite": True})
    assert main(["run", str(config)]) == 0
    err = capsys.readouterr().err
    for label in ("pass 1 of 2: time x time cross-products", "pass 2 of 2: EOF maps"):
        after = err.split(label + "\n", 1)[1]
        assert re.match(r"(\r\[#* *\] \| +\d+% Completed \| +[\d.]+s)*\r\[#{40}\] \| 100% Completed", after)
    assert main(["run", "--quiet", str(config)]) == 0
    assert capsys.readouterr().err == ""


def _worker_facts(_) -> tuple:
    import netCDF4
    from distributed import get_worker

    return (os.environ.get("OPENBLAS_NUM_THREADS"), [type(plugin).__name__ for plugin in get_worker().plugins.values()],
            netCDF4.get_chunk_cache()[0])


@pytest.mark.slow
def test_local_workers_return_freed_memory_as_this_process_does(tmp_path):
    """Each worker of the local cluster fixes glibc's mmap threshold as this process does (the plugin's
    work is checked in this process by test_streaming.py::test_freed_blocks_go_back_to_the_system), keeps
    the planned chunk cache for the NetCDF files it opens (netCDF4's get_chunk_cache), not the library's
    64 MiB, and runs one BLAS thread as dask sets it."""
    import dask

    spec = ComputeSection(scheduler="processes", workers=2)
    with climodes.cluster.running(spec, False, "00:10:00", tmp_path, chunk_cache=3 * 2**20) as session, \
            session.during("facts"):
        facts = dask.compute(*[dask.delayed(_worker_facts)(i) for i in range(4)])
    for blas, plugins, cache in facts:
        assert blas == "1" and "ReturnFreedMemory" in plugins and cache == 3 * 2**20
