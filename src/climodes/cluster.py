"""Where dask runs the work, and what the user sees while it does.

``threads`` (the default) suits numpy work that releases the GIL; ``processes``
isolates workers; ``synchronous`` runs everything in the calling thread, for
debugging.  A batch job on a shared cluster runs ``climodes run`` inside its
allocation with ``compute.workers`` set to the cores it was given.
"""

from __future__ import annotations

import contextlib
import os
import sys
from typing import Callable, ContextManager, Iterator

import dask
from threadpoolctl import threadpool_limits

from climodes.config import ComputeSection


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


def worker_count(spec: ComputeSection) -> int:
    """The number of workers ``spec`` asks for (``auto``: the cores this process may use)."""
    if spec.workers != "auto":
        return int(spec.workers)
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not every platform has affinity
        return max(1, os.cpu_count() or 1)


@contextlib.contextmanager
def dask_settings(spec: ComputeSection) -> Iterator[None]:
    """Run the enclosed computations on ``spec``'s scheduler with its worker count."""
    with dask.config.set(scheduler=spec.scheduler, num_workers=worker_count(spec)):
        yield


def pass_context(progress: bool, workers: int) -> Callable[[str], ContextManager]:
    """What surrounds each pass over the data: a progress bar on stderr (when ``progress``), and BLAS
    limited to its share of the cores, since the dask workers already run blocks side by side."""
    cores = worker_count(ComputeSection())

    @contextlib.contextmanager
    def during(label: str) -> Iterator[None]:
        with contextlib.ExitStack() as stack:
            stack.enter_context(threadpool_limits(max(1, cores // max(workers, 1)), user_api="blas"))
            if progress:
                from dask.diagnostics import ProgressBar

                print(label, file=sys.stderr)
                stack.enter_context(ProgressBar(minimum=0.5, width=40, out=sys.stderr))
            yield

    return during


def show_progress(quiet: bool) -> bool:
    """Progress bars go to a terminal only, and never with ``--quiet``."""
    return not quiet and sys.stderr.isatty()
