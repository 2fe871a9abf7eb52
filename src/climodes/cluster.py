"""Where dask runs the work, what the user sees while it does, and the batch scripts of ``climodes submit``.

``compute.scheduler`` chooses:

- ``threads`` (the default): dask's threaded scheduler in this process; numpy releases the GIL, so
  blocks are worked on side by side.
- ``processes``: a ``distributed.LocalCluster`` of worker processes on this machine.  The whole
  graph of a pass goes to the workers: the tasks that read a block and reduce it to its small
  product run there, and so do the pairwise sums of :func:`climodes.blocks.tree_sum`, so only the
  small products (Gram or sketch sums, map parts) travel, and each pass's traffic is measured.
- ``slurm`` / ``pbs``: the same, with the workers started as batch jobs by ``dask-jobqueue`` and the
  dask scheduler in this process; or, with ``compute.address``, the workers of a dask scheduler
  already running.
- ``synchronous``: everything in the calling thread, for debugging.

Inside a batch allocation (``SLURM_JOB_ID`` or ``PBS_JOBID`` set) ``workers: auto`` means the
allocation's cores, and the run plans for no more memory than the allocation holds.
"""

from __future__ import annotations

import contextlib
import ctypes
import logging
import math
import os
import re
import shutil
import socket
import subprocess
import sys
import tempfile
import time
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, ContextManager, Iterator

import dask
from threadpoolctl import threadpool_limits

from climodes.config import ComputeSection, memory_bytes, size_text
from climodes.errors import UserError
from climodes.solvers import LIBRARY_WORK

PROGRESS_MINIMUM = 0.5  # seconds a pass must last before its progress bar is drawn
SYSTEMS = {"slurm": ("SLURM", "sbatch"), "pbs": ("PBS", "qsub")}
# the workers of batch jobs never pause or spill to disk: the plan sizes the blocks for the job's memory,
# and nothing is kept between tasks that spilling could free
WORKER_ENVIRONMENT = {"DASK_DISTRIBUTED__WORKER__MEMORY__TARGET": "False",
                      "DASK_DISTRIBUTED__WORKER__MEMORY__SPILL": "False",
                      "DASK_DISTRIBUTED__WORKER__MEMORY__PAUSE": "False"}
QUIET_LOGGERS = ("distributed", "dask_jobqueue", "tornado", "asyncio")
MMAP_THRESHOLD = 2**20  # bytes from which each allocation is mapped on its own, and unmapped when freed
MMAP_THRESHOLD_MAX = 2**25  # the most glibc's own threshold rises to (64-bit)
FREED_KEPT = 0.3e9  # the most glibc kept of freed blocks with its adaptive threshold (measured: 0.15-0.25 GB)


def freed_threshold(chunk_bytes: int) -> int:
    """The size from which freed blocks go back to the system: :data:`MMAP_THRESHOLD`, or twice the
    files' largest chunk (``chunk_bytes``, decompressed), up to :data:`MMAP_THRESHOLD_MAX`: the buffer the
    library decompresses each chunk into is then reused, not mapped anew for each chunk (reading chunks
    of 1.5 MB took twice as long with 1 MiB, measured)."""
    return min(max(MMAP_THRESHOLD, 2 * chunk_bytes), MMAP_THRESHOLD_MAX)


def return_freed_memory(threshold: int = MMAP_THRESHOLD) -> None:
    """Have the C library give each freed block of ``threshold`` bytes or more back to the system.

    glibc maps large blocks on their own at first, but raises that threshold (up to 32 MiB) each time
    it unmaps one, so blocks of a pass's size then come from its heaps and stay resident when freed:
    measured on a 0.95 GB field, 0.15 to 0.25 GB held beyond what the run used, which no plan can
    count.  A fixed threshold (``mallopt(M_MMAP_THRESHOLD)``) keeps them mapped on their own.  Nothing
    happens where the C library has no ``mallopt`` (it is glibc's).  Dask workers do the same when they
    join (:func:`_workers_return_freed_memory`).
    """
    try:
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return
    mallopt(-3, threshold)  # -3: M_MMAP_THRESHOLD in glibc's malloc.h


def resident_bytes() -> int:
    """The memory this process holds now (its resident set), from ``/proc`` where there is one;
    elsewhere the most it has held so far."""
    try:
        with open("/proc/self/statm") as f:
            return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError, IndexError):
        pass
    try:
        import resource
    except ImportError:  # not on every platform
        return 0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return int(peak if sys.platform == "darwin" else peak * 1024)  # bytes on macOS, KiB elsewhere


# --- the batch allocation this process runs in, if any


@dataclass(frozen=True)
class Allocation:
    """The batch job this process runs in: its system, id, cores and memory in bytes (None: not said)."""

    system: str
    job: str
    cores: int | None
    memory: int | None

    def text(self) -> str:
        what = [f"{self.cores} cores" if self.cores else "", size_text(self.memory) if self.memory else ""]
        return f"{self.system} job {self.job}" + (f" ({', '.join(w for w in what if w)})" if any(what) else "")


def _first_int(text: str | None) -> int | None:
    match = re.match(r"\s*(\d+)", text or "")
    return int(match.group(1)) if match else None


def _cgroup_memory() -> int | None:
    """The memory limit of this process's cgroup (version 2), where the batch system set one."""
    try:
        with open("/proc/self/cgroup") as f:
            path = next(line.split(":", 2)[2].strip() for line in f if line.startswith("0::"))
        limit = Path("/sys/fs/cgroup", path.lstrip("/"), "memory.max").read_text().strip()
    except (OSError, StopIteration, IndexError):
        return None
    return int(limit) if limit.isdigit() else None


def batch_allocation(environ: dict | None = None) -> Allocation | None:
    """The batch job this process runs in, from the variables SLURM and PBS set in a job's environment.

    SLURM (sbatch's output environment): cores from ``SLURM_CPUS_PER_TASK``, else ``SLURM_CPUS_ON_NODE``;
    memory in MB from ``SLURM_MEM_PER_NODE``, else ``SLURM_MEM_PER_CPU`` times the cores.  PBS: cores from
    ``NCPUS`` (PBS Pro) or ``PBS_NUM_PPN`` (Torque); memory from the job's cgroup where there is one.
    """
    env = os.environ if environ is None else environ
    if env.get("SLURM_JOB_ID"):
        cores = _first_int(env.get("SLURM_CPUS_PER_TASK")) or _first_int(env.get("SLURM_CPUS_ON_NODE"))
        per_node, per_cpu = _first_int(env.get("SLURM_MEM_PER_NODE")), _first_int(env.get("SLURM_MEM_PER_CPU"))
        memory = per_node * 2**20 if per_node else (per_cpu * cores * 2**20 if per_cpu and cores else None)
        return Allocation("SLURM", env["SLURM_JOB_ID"], cores, memory or _cgroup_memory())
    if env.get("PBS_JOBID"):
        cores = _first_int(env.get("NCPUS")) or _first_int(env.get("PBS_NUM_PPN"))
        return Allocation("PBS", env["PBS_JOBID"], cores, _cgroup_memory())
    return None


def worker_count(spec: ComputeSection) -> int:
    """The number of workers ``spec`` asks for (``auto``: the cores this process may use, and inside a
    batch allocation the allocation's)."""
    if spec.workers != "auto":
        return int(spec.workers)
    try:
        cores = max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not every platform has affinity
        cores = max(1, os.cpu_count() or 1)
    allocation = batch_allocation()
    return min(cores, allocation.cores) if allocation and allocation.cores else cores


def run_memory(spec: ComputeSection) -> int:
    """Bytes the run may use: ``compute.memory``, and inside a batch allocation at most what it holds."""
    budget = memory_bytes(spec.memory)
    allocation = batch_allocation()
    return min(budget, allocation.memory) if allocation and allocation.memory else budget


@dataclass(frozen=True)
class Capacity:
    """What the solver plans with: blocks worked on at once in one process, the bytes that process may
    use, and what it holds before reading any (see :func:`climodes.solvers.plan_solver`)."""

    workers: int
    memory: int
    in_use: int


def capacity(spec: ComputeSection, workers: int | None = None) -> Capacity:
    """The planning figures of ``spec``'s scheduler (with ``workers`` instead of ``compute.workers``).

    With threads, one process works on ``workers`` blocks within the whole budget.  A local cluster
    is ``workers`` processes of one thread within the same budget: each holds its interpreter and
    libraries, counted as much as this process holds, and what its libraries allocate while it reads
    (:data:`~climodes.solvers.LIBRARY_WORK`, which every plan keeps for this process: measured, a cluster
    of 2 workers went 20-70 MB past a 1GB budget without it).  A worker job holds ``job_cores`` blocks within
    ``job_memory``, and this process, which gathers the small products, stays within
    ``compute.memory``: the plan satisfies both.
    """
    budget, held = run_memory(spec), resident_bytes()
    if spec.scheduler in SYSTEMS:
        return Capacity(spec.job_cores, min(budget, memory_bytes(spec.job_memory)), held)
    workers = workers or worker_count(spec)
    if spec.scheduler == "processes":  # each worker's libraries allocate while it reads, as this process's do
        return Capacity(workers, budget, held * (workers + 1) + workers * LIBRARY_WORK)
    return Capacity(workers, budget, held)


# --- running the passes


@dataclass
class Session:
    """Where a run's passes go: said in run.log and in ``modes.nc`` (``climodes_compute``), and what each
    pass moved between processes (distributed schedulers only)."""

    description: str
    during: Callable[[str], ContextManager]
    moved: list[str] = field(default_factory=list)


def show_progress(quiet: bool) -> bool:
    """Progress bars go to a terminal only, and never with ``--quiet``."""
    return not quiet and sys.stderr.isatty()


def _local_passes(progress: bool, workers: int) -> Callable[[str], ContextManager]:
    """What surrounds each pass on the threaded scheduler: a progress bar on stderr (when ``progress``),
    and BLAS limited to its share of the cores, since the dask workers already run blocks side by side."""
    cores = worker_count(ComputeSection())

    @contextlib.contextmanager
    def during(label: str) -> Iterator[None]:
        with contextlib.ExitStack() as stack:
            stack.enter_context(threadpool_limits(max(1, cores // max(workers, 1)), user_api="blas"))
            if progress:
                from dask.diagnostics import ProgressBar

                print(label, file=sys.stderr)
                stack.enter_context(ProgressBar(minimum=PROGRESS_MINIMUM, width=40, out=sys.stderr))
            yield

    return during


def _workers_return_freed_memory(threshold: int, chunk_cache: int):
    """A worker plugin: each worker gives freed blocks back to the system (:func:`return_freed_memory` with
    ``threshold``, set when it joins), and what its heap freed at the end of each task (glibc's
    ``malloc_trim``), so a worker holds what it keeps, not the peak of its last task; the NetCDF files it
    opens keep ``chunk_cache`` bytes of decompressed chunks each, as planned (the library's default,
    64 MiB a file, is in no plan).

    The fixed threshold also speeds the reading: dask starts its workers with ``MALLOC_TRIM_THRESHOLD_``
    set, which fixes glibc's threshold at 128 kB, so every decompressed chunk above that (260 kB for one
    map of a 1-degree grid) was mapped and unmapped anew: reading per-step compressed maps took 1.6-1.8
    times as long in a worker as in a thread (measured; 1 MiB: as long).
    """
    from distributed import WorkerPlugin

    class ReturnFreedMemory(WorkerPlugin):
        def setup(self, worker) -> None:
            import netCDF4

            return_freed_memory(threshold)
            netCDF4.set_chunk_cache(chunk_cache, *netCDF4.get_chunk_cache()[1:])
            self.trim = getattr(ctypes.CDLL(None), "malloc_trim", lambda pad: 0)

        def transition(self, key, start: str, finish: str, **kwargs) -> None:
            if start == "executing":
                self.trim(0)

    return ReturnFreedMemory()


@contextlib.contextmanager
def running(spec: ComputeSection, progress: bool, walltime: str, folder: Path,
            chunk_bytes: int = 0, chunk_cache: int = 4 * 2**20, slack: float = 0.0) -> Iterator[Session]:
    """Run the enclosed passes where ``spec`` says; the workers started for them end with the block.  From
    here on, where the plan has little ``slack``, this process gives large freed blocks back to the system
    (:func:`return_freed_memory`); dask workers always do.

    Parameters
    ----------
    spec
        The ``compute`` section.
    progress
        Draw a progress bar on stderr for each pass.
    walltime
        Time limit of worker batch jobs (``HH:MM:SS``).
    folder
        Where worker jobs write their logs, in a hidden folder removed at the end (it must be
        seen from the nodes: the config's folder).
    chunk_bytes
        The largest chunk of the files read, decompressed (see :func:`freed_threshold`).
    chunk_cache
        Bytes of decompressed chunks each NetCDF file may keep in a dask worker (in this process, the
        reading sets its own: :func:`climodes.storage.staged`).
    slack
        Bytes of ``compute.memory`` the plan leaves unused: where they hold what glibc keeps of freed
        blocks (:data:`FREED_KEPT`), this process leaves glibc's adaptive threshold alone, which is faster
        (mapping each big block anew cost 10-20 % of a 720 x 65k run, measured).
    """
    threshold = freed_threshold(chunk_bytes)
    if slack < FREED_KEPT:
        return_freed_memory(threshold)
    host = socket.gethostname()
    allocation = batch_allocation()
    inside = f", in {allocation.text()}" if allocation else ""
    if spec.scheduler in ("threads", "synchronous"):
        workers = worker_count(spec) if spec.scheduler == "threads" else 1
        with dask.config.set(scheduler=spec.scheduler, num_workers=workers):
            yield Session(f"{spec.scheduler}: {workers} worker thread(s) on {host}{inside}",
                          _local_passes(progress, workers))
        return
    from distributed import Client, LocalCluster

    with contextlib.ExitStack() as stack:
        stack.enter_context(_quiet_distributed())
        stack.enter_context(dask.config.set({"distributed.scheduler.no-workers-timeout": f"{spec.worker_wait}s"}))
        if spec.scheduler == "processes":
            workers = worker_count(spec)
            cluster = stack.enter_context(LocalCluster(
                n_workers=workers, threads_per_worker=1, processes=True, host="127.0.0.1", dashboard_address=None,
                memory_limit=0, silence_logs=logging.CRITICAL))
            client = stack.enter_context(Client(cluster, set_as_default=False))
            where = f"processes: a local dask cluster of {workers} worker processes on {host}{inside}"
        elif spec.address:
            client = stack.enter_context(_joined(spec))
            threads = sum(client.nthreads().values())
            where = (f"{spec.scheduler}: joined the dask scheduler at {spec.address}: {len(client.nthreads())} "
                     f"workers, {threads} threads")
        else:
            check_batch_commands(spec)
            logs = Path(tempfile.mkdtemp(prefix=".climodes-workers-", dir=_writable(folder)))
            stack.callback(shutil.rmtree, logs, ignore_errors=True)
            cluster = stack.enter_context(_batch_cluster(spec, walltime, logs))
            client = stack.enter_context(Client(cluster, set_as_default=False))
            where = _wait_for_jobs(spec, client, cluster, host)
        client.register_plugin(_workers_return_freed_memory(threshold, chunk_cache))
        session = Session(where, lambda label: contextlib.nullcontext())
        session.during = _distributed_passes(client, session, progress)
        with dask.config.set({"climodes.read-blocks-in-task": True}):
            yield session


@contextlib.contextmanager
def _quiet_distributed() -> Iterator[None]:
    """Keep distributed's own log lines and warnings off the user's terminal: what goes wrong is said
    once, as a climodes error."""
    names = set(QUIET_LOGGERS) | {name for name in logging.root.manager.loggerDict
                                  if name.startswith(tuple(f"{n}." for n in QUIET_LOGGERS))}
    levels = {name: logging.getLogger(name).level for name in names}
    try:
        for name in names:
            logging.getLogger(name).setLevel(logging.CRITICAL + 1)
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", module="distributed")
            warnings.filterwarnings("ignore", module="dask_jobqueue")
            warnings.filterwarnings("ignore", message=".*large graph.*")
            yield
    finally:
        for name, level in levels.items():
            logging.getLogger(name).setLevel(level)


def _writable(folder: Path) -> Path:
    return folder if os.access(folder, os.W_OK | os.X_OK) else Path(tempfile.gettempdir())


def _joined(spec: ComputeSection):
    from distributed import Client

    try:
        client = Client(spec.address, timeout=spec.worker_wait, set_as_default=False)
    except (OSError, TimeoutError) as err:
        raise UserError(f"compute.address: cannot reach a dask scheduler at {spec.address} ({err}); check the "
                        "address, or remove it to start worker jobs") from None
    if not client.nthreads():
        try:
            client.wait_for_workers(1, timeout=spec.worker_wait)
        except TimeoutError:
            client.close()
            raise UserError(f"compute.worker_wait: the dask scheduler at {spec.address} had no worker within "
                            f"{spec.worker_wait} s; start workers for it, or raise compute.worker_wait") from None
    return client


def check_batch_commands(spec: ComputeSection) -> None:
    """Where worker jobs are to be submitted (``slurm``/``pbs`` without ``compute.address``), the batch
    system's submit command must be installed here; say so in one line before any work if it is not."""
    if spec.scheduler not in SYSTEMS or spec.address:
        return
    system, command = SYSTEMS[spec.scheduler]
    if not shutil.which(command):
        raise UserError(f"compute.scheduler: {spec.scheduler} starts its workers with {command}, which is not "
                        f"installed here; run climodes where {system} jobs are submitted (a login node or a "
                        "batch job), or choose compute.scheduler threads or processes")


def _batch_cluster(spec: ComputeSection, walltime: str, logs: Path):
    """The dask-jobqueue cluster of ``spec``, its jobs submitted; a refused submission is a clear error."""
    import signal

    interrupt = signal.getsignal(signal.SIGINT)
    from dask_jobqueue import PBSCluster, SLURMCluster

    signal.signal(signal.SIGINT, interrupt)  # importing dask-jobqueue makes Ctrl-C exit quietly with status 0

    kind = SLURMCluster if spec.scheduler == "slurm" else PBSCluster
    cluster = kind(cores=spec.job_cores, processes=1, memory=str(memory_bytes(spec.job_memory)),
                   walltime=walltime, queue=spec.queue, account=spec.account,
                   job_extra_directives=list(spec.directives), interface=spec.interface,
                   log_directory=str(logs), job_name="climodes-worker", python=sys.executable,
                   scheduler_options={"dashboard": False, "dashboard_address": ":0"},
                   job_script_prologue=[f"export {k}={v}" for k, v in WORKER_ENVIRONMENT.items()])
    try:
        _refused(cluster.job_script(), spec.scheduler)
        cluster.scale(jobs=spec.jobs)
    except BaseException:
        cluster.close()
        raise
    return cluster


def _refused(script: str, scheduler: str) -> None:
    """Check that the batch system accepts a worker job before submitting any: ``sbatch --test-only``, or
    for PBS a job submitted on hold and deleted.  dask-jobqueue would otherwise log a refusal in the
    background and leave the run waiting for workers that never come."""
    system, command = SYSTEMS[scheduler]
    with tempfile.NamedTemporaryFile("w", suffix=".sh") as f:
        f.write(script)
        f.flush()
        check = [command, "--test-only", f.name] if scheduler == "slurm" else [command, "-h", f.name]
        try:
            done = subprocess.run(check, capture_output=True, text=True, timeout=120)
        except (OSError, subprocess.TimeoutExpired) as err:
            raise UserError(f"compute.scheduler: {command} did not answer ({err}); check that {system} works "
                            "here (try it by hand)") from None
    if done.returncode != 0:
        raise UserError(f"compute: {system} refused the worker jobs ({_refusal(done.stderr or done.stdout)}); "
                        "ask for less with compute.job_memory, compute.job_cores or compute.walltime, or "
                        "choose compute.queue")
    if scheduler == "pbs" and done.stdout.strip():
        subprocess.run(["qdel", done.stdout.strip()], capture_output=True, timeout=120)


def _refusal(text: str) -> str:
    """The batch system's own reason, from a failed submission's output."""
    lines = [line.strip() for line in text.splitlines() if "error" in line.lower() and line.strip()]
    reason = (lines[-1] if lines else text.strip().splitlines()[-1] if text.strip() else "no reason given")
    return re.sub(r"^(\w+: )?(error: )?(Batch job submission failed: |allocation failure: )?", "", reason,
                  flags=re.IGNORECASE)


def _wait_for_jobs(spec: ComputeSection, client, cluster, host: str) -> str:
    """Wait for the worker jobs to start (up to ``compute.worker_wait``); go on with those that did."""
    system = SYSTEMS[spec.scheduler][0]
    try:
        client.wait_for_workers(spec.jobs, timeout=spec.worker_wait)
    except TimeoutError:
        if not client.nthreads():
            raise UserError(f"compute.worker_wait: none of the {spec.jobs} {system} worker jobs started within "
                            f"{spec.worker_wait} s (busy queue, or jobs that cannot reach this host); raise "
                            "compute.worker_wait, ask for less (compute.job_cores, compute.job_memory, "
                            "compute.walltime), or set compute.interface") from None
    jobs = sorted(job.job_id for job in cluster.workers.values() if getattr(job, "job_id", None))
    started = len(client.nthreads())
    return (f"{spec.scheduler}: {started} of {spec.jobs} worker jobs ({', '.join(jobs)}) of {spec.job_cores} cores "
            f"and {spec.job_memory} each, dask scheduler on {host}")


def _served_bytes(client) -> int:
    """Bytes the workers have sent so far, to each other and to this process."""
    return sum(client.run(lambda dask_worker: dask_worker.transfer_outgoing_bytes_total).values())


def _distributed_passes(client, session: Session, progress: bool) -> Callable[[str], ContextManager]:
    """Each pass: its whole graph computed on the workers, a progress bar drawn from the scheduler's
    task counts (when ``progress``), a lost worker turned into a clear error, and the traffic counted."""
    from distributed.client import futures_of
    from distributed.protocol.pickle import dumps
    from distributed.scheduler import KilledWorker, NoWorkerError

    state = {"label": ""}

    def get(expr, keys, **kwargs):
        sent = len(dumps(dict(expr.__dask_graph__())))
        before = _served_bytes(client)
        futures = client.get(expr, keys, sync=False)
        try:
            if progress:
                _progress_bar(futures_of(futures), client)
            results = client.gather(futures)
        except KilledWorker as err:
            raise UserError(f"compute: a dask worker died {err.allowed_failures + 1} times while working on "
                            f"the same block (last {err.last_worker.address}); a worker short of memory is the "
                            "usual cause: raise compute.job_memory (slurm, pbs) or compute.memory, or use fewer "
                            "compute.workers; nothing was written") from None
        except NoWorkerError:
            raise UserError("compute.worker_wait: the run lost its dask workers and none came back within "
                            f"{dask.config.get('distributed.scheduler.no-workers-timeout')} (worker jobs cancelled, "
                            "ended or past their walltime); nothing was written; raise compute.walltime or "
                            "compute.worker_wait, or run again") from None
        finally:
            for future in futures_of(futures):
                future.release()
        returned = dask.sizeof.sizeof(results)
        between = max(0, _served_bytes(client) - before - returned)
        session.moved.append(f"{state['label']}: {size_text(sent)} of tasks sent to the workers, {size_text(between)} "
                             f"between workers, {size_text(returned)} of results back")
        return results

    @contextlib.contextmanager
    def during(label: str) -> Iterator[None]:
        state["label"] = label
        if progress:
            print(label, file=sys.stderr)
        with dask.config.set(scheduler=get):
            yield

    return during


def _progress_bar(futures, client) -> None:
    """Draw the progress of ``futures`` until they are done."""
    from distributed.diagnostics.progressbar import TextProgressBar

    class Bar(TextProgressBar):
        """distributed's text bar, on stderr, drawn once the pass has lasted ``PROGRESS_MINIMUM``."""

        def __init__(self, futures, client):
            self.drawn = False
            super().__init__(futures, scheduler=client.scheduler.address, loop=client.loop, width=40)

        def _draw_bar(self, remaining, all, **kwargs):
            if self.elapsed < PROGRESS_MINIMUM:
                return
            self.drawn = True
            done = (1 - remaining / all) if all else 1.0
            sys.stderr.write(f"\r[{'#' * int(40 * done):<40}] | {int(100 * done):3d}% Completed | "
                             f"{self.elapsed:5.1f}s")
            sys.stderr.flush()

        def _draw_stop(self, **kwargs):
            if self.drawn:
                sys.stderr.write("\n")
                sys.stderr.flush()

    Bar(futures, client)


# --- batch scripts for `climodes submit`

READ_RATE = 50e6  # bytes a second a pass reads at least, from a busy shared file system (a cautious guess)
FLOP_RATE = 1e9  # floating-point operations a second per core, at least (a cautious guess)


def walltime(spec: ComputeSection, method: str, shape: tuple[int, int, int], count: int, itemsize: int,
             cores: int) -> str:
    """``compute.walltime``, or when ``auto`` the estimate for ``cores`` working on the run (the worker
    jobs' when there are some)."""
    if spec.walltime != "auto":
        return spec.walltime
    return estimated_walltime(method, shape, count, itemsize, spec.jobs * spec.job_cores
                              if spec.scheduler in SYSTEMS else cores)


def estimated_walltime(method: str, shape: tuple[int, int, int], count: int, itemsize: int, cores: int) -> str:
    """A cautious time limit for a run (:func:`estimated_seconds`), rounded up to ten minutes, as HH:MM:SS."""
    minutes = 10 * math.ceil(estimated_seconds(method, shape, count, itemsize, cores) / 600)
    return f"{minutes // 60:02d}:{minutes % 60:02d}:00"


def estimated_seconds(method: str, shape: tuple[int, int, int], count: int, itemsize: int, cores: int) -> float:
    """A cautious duration of a run: twice its reads and arithmetic at slow rates, plus ten minutes.

    Passes: 1 (exact), 2 (gram), at most ``2 + POWER_ITERATIONS`` (randomized).  Arithmetic: the SVD of an
    ``n x p`` matrix costs about ``4 n p min(n, p)`` operations, the Gram matrix ``2 n^2 p``, each
    randomized pass ``4 n p r`` for ``r`` sketch vectors (operation counts of the dense products and of a
    Golub-Kahan SVD, common practice).
    """
    from climodes.solvers import OVERSAMPLING, POWER_ITERATIONS

    steps, nlat, nlon = shape
    points = nlat * nlon
    rank = count + OVERSAMPLING
    passes, flops = {
        "exact": (1, 4 * steps * points * min(steps, points)),
        "gram": (2, 2 * steps**2 * points + 2 * steps * points * count),
    }.get(method, (2 + POWER_ITERATIONS, (2 + POWER_ITERATIONS) * 4 * steps * points * rank))
    return 2 * (passes * steps * points * itemsize / READ_RATE + flops / (FLOP_RATE * cores)) + 600


def submit_cores(spec: ComputeSection, method: str, nlat: int) -> int:
    """Cores the batch job of a run asks for: ``compute.workers`` when a number; one when worker jobs do the
    work; four for the exact solver (LAPACK's threads); for a streaming solver up to 8, four blocks each."""
    from climodes.solvers import BLOCKS_PER_WORKER

    if spec.scheduler in SYSTEMS:
        return 1
    if spec.workers != "auto":
        return int(spec.workers)
    return 4 if method == "exact" else max(1, min(8, nlat // BLOCKS_PER_WORKER))


def _request(nbytes: int) -> int:
    """Memory to ask for: rounded up to 256 MiB, at least 512 MiB, in MiB."""
    return max(512, 256 * math.ceil(nbytes / 2**28))


def _mib(mib: int) -> str:
    return f"{mib // 1024}G" if mib % 1024 == 0 else f"{mib}M"


@dataclass(frozen=True)
class BatchJob:
    """A batch job that runs one config: what it asks for and why."""

    system: str  # slurm or pbs
    config: Path
    cores: int
    memory_mib: int
    walltime: str
    why: str
    overwrite: bool = False  # the run replaces an existing results folder (climodes run --overwrite)


def batch_job(spec_source: Path, compute: ComputeSection, system: str, method: str, shape, count: int,
              itemsize: int, needed: int, overwrite: bool = False) -> BatchJob:
    """The job for a run: ``cores`` from :func:`submit_cores`, the memory the plan needs (``needed`` bytes),
    the walltime of ``compute.walltime`` or :func:`estimated_walltime`."""
    cores = submit_cores(compute, method, shape[1])
    steps, nlat, nlon = shape
    why = (f"{steps} steps x {nlat * nlon} points ({size_text(steps * nlat * nlon * itemsize)}), {method} solver: "
           f"needs {size_text(needed)}" + ("" if compute.walltime != "auto" else "; time limit estimated"))
    return BatchJob(system, spec_source, cores, _request(needed), walltime(compute, method, shape, count, itemsize,
                                                                            cores), why, overwrite)


def batch_system(compute: ComputeSection, chosen: str | None) -> str:
    """``slurm`` or ``pbs``: the one asked for, else the config's scheduler, else the one installed here."""
    if chosen:
        return chosen
    if compute.scheduler in SYSTEMS:
        return compute.scheduler
    for system, (_, command) in SYSTEMS.items():
        if shutil.which(command):
            return system
    return "slurm"


MARK = "# written by climodes submit"


def batch_script(job: BatchJob, compute: ComputeSection) -> str:
    """The text of the batch script: directives, then ``climodes run --quiet CONFIG`` with this Python
    (``--overwrite`` too when the job was asked to replace the results)."""
    folder, stem = job.config.parent, job.config.stem
    if job.system == "slurm":
        lines = [f"--job-name=climodes-{stem}", "--nodes=1", "--ntasks=1", f"--cpus-per-task={job.cores}",
                 f"--mem={_mib(job.memory_mib)}", f"--time={job.walltime}", f"--output={folder / stem}-%j.log"]
        lines += [f"--partition={compute.queue}"] if compute.queue else []
        lines += [f"--account={compute.account}"] if compute.account else []
        prefix = "#SBATCH"
    else:
        lines = [f"-N {f'climodes-{stem}'[:15]}", f"-l select=1:ncpus={job.cores}:mem={job.memory_mib}mb",
                 f"-l walltime={job.walltime}", "-j oe", f"-o {folder}/"]
        lines += [f"-q {compute.queue}"] if compute.queue else []
        lines += [f"-A {compute.account}"] if compute.account else []
        prefix = "#PBS"
    lines += list(compute.directives)
    body = [
        "#!/bin/bash",
        *(f"{prefix} {line}" for line in lines),
        f"{MARK} for {job.config}",
        f"# {job.why}; change these under compute: in the config",
        "set -eu",
        f"cd {_quoted(folder)}",
        f"exec {_quoted(Path(sys.executable))} -m climodes run --quiet {'--overwrite ' * job.overwrite}"
        f"{_quoted(job.config)}",
        "",
    ]
    return "\n".join(body)


def _quoted(path: Path) -> str:
    import shlex

    return shlex.quote(str(path))


def script_path(config: Path, system: str) -> Path:
    return config.with_name(f"{config.stem}.{'sbatch' if system == 'slurm' else 'pbs'}")


def write_script(path: Path, text: str) -> None:
    """Write the script under a temporary name and rename it into place; replace only a script of ours."""
    if os.path.lexists(path) and (path.is_symlink() or not path.is_file()):
        raise UserError(f"{path} exists and is not a file (a folder, a link or a device); move it away, and "
                        "climodes will write the batch script there")
    if path.exists() and MARK not in path.read_text(errors="replace"):
        raise UserError(f"{path} exists and was not written by climodes submit; move it away, and climodes "
                        "will write the batch script there")
    try:
        with tempfile.NamedTemporaryFile("w", dir=path.parent, prefix=f".{path.name}.", delete=False) as f:
            f.write(text)
        os.chmod(f.name, 0o755)
        os.replace(f.name, path)
    except OSError as err:
        with contextlib.suppress(OSError, NameError):
            os.unlink(f.name)
        raise UserError(f"cannot write the batch script {path} ({err.strerror or err}); make its folder writable"
                        ) from None


def submit_command(system: str) -> tuple[str, str]:
    """The batch system's name and submit command; a clear error when the command is not installed."""
    name, command = SYSTEMS[system]
    if not shutil.which(command):
        raise UserError(f"{command} ({name}) is not installed here; run climodes submit where {name} jobs are "
                        "submitted (a login node), or use --dry-run to only write the script")
    return name, command


def submit_script(path: Path, system: str, wait: bool, say: Callable[[str], None]) -> int:
    """Submit the script with ``sbatch`` or ``qsub``; with ``wait``, return the job's exit status (else 0).

    A refused submission is a :class:`UserError` with the batch system's reason.  ``sbatch --wait`` and
    PBS Pro's ``qsub -W block=true`` wait for the job and exit with its status.
    """
    name, command = submit_command(system)
    if system == "slurm":
        args = [command, "--parsable"] + (["--wait"] if wait else []) + [str(path)]
    else:
        args = [command] + (["-W", "block=true"] if wait else []) + [str(path)]
    proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            cwd=path.parent)
    first = proc.stdout.readline().strip()
    job = first.split(";")[0] if first and re.match(r"^\d+", first) else ""
    if job:
        say(f"climodes: submitted {name} job {job} ({path})")
    out, err = proc.communicate()
    if not job:
        raise UserError(f"{name} refused the batch job: {_refusal(err or out or first)}; ask for less under "
                        "compute: (workers, memory, walltime) or choose compute.queue")
    if wait:
        say(f"climodes: {name} job {job} ended with exit status {proc.returncode}")
        return proc.returncode
    return 0
