"""climodes on the same daily field stored in the layouts archives use, against one plain read of each.

For each layout: the time of one plain sequential read of the files in their own chunk order (netCDF4 or
zarr, no climodes), measured in this run after a first read that fills the page cache; the start-up of
climodes (``climodes check`` of the same config: imports, opening, planning); ``climodes run`` (randomized
solver, day-of-year anomalies, 6 modes) at each memory budget, and the Gram solver at one; the read order
it chose, the reads of the files and the passes it made, its time against the target (1.5 x reads x one
read + start-up), and the peak resident memory of its process tree against ``compute.memory``.

Beside the target, each layout's bare numpy lower bound of the same job, timed in this run: a script that
reads every value into memory (netCDF4 or zarr, the files' own order), removes a day-of-year climatology,
weights by sqrt(cos(lat)) and takes a randomized SVD with one power iteration (6 modes, 10 extra columns),
writing nothing.  It holds the whole field (about twice its size): what the run would cost with no
memory budget and no results, the floor the run's arithmetic cannot go under.  The two compressed
NetCDF layouts also run on a local dask cluster of 2 worker processes (``compute.scheduler: processes``),
where each worker decompresses its own chunks outside the other's HDF5 lock.  For the NetCDF layouts, the same
job streamed straight from the files in their own order without any copy (:data:`STREAMED_JOB`: 5 reads, one
for the climatology, one for each product of a randomized SVD with one power iteration), to weigh against the
run's one read into a scratch copy.  Last, ``climodes project`` of
the same files onto the modes of the first run: one read of the files, against 1.5 x one read + start-up.

Layouts: uncompressed chunks of (30, lat, lon); zlib 4 + shuffle chunks of (1, lat, lon) (typical model
output); zlib 4 + shuffle chunks of (365, 23, 45); a Zarr copy of the second (its own default compressor,
chunks of (30, lat, lon)).

Usage: python benchmarks/layouts.py   (default: 1460 daily steps x 1 degree, 0.38 GB, a few minutes on
       2 cores; CLIMODES_BENCH_SIZE=full: the 3650 x 1 degree field of 0.95 GB in 5 files)
"""

from __future__ import annotations

import os
import re
import shutil
import sys
import tempfile
import textwrap
import time
import warnings
from pathlib import Path

import netCDF4
import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from fields import DATA, make_field, temporary_files_removed_at_exit  # noqa: E402
from run import CLIMODES, measured, script  # noqa: E402

FULL = os.environ.get("CLIMODES_BENCH_SIZE") == "full"
STEPS, DEGREES, FILES = (3650, 1.0, 5) if FULL else (1460, 1.0, 4)
BUDGETS = ("1.5GB", "600MB") if FULL else ("1GB", "600MB")
PROCESSES_BUDGET = "2GB" if FULL else "1.2GB"  # three interpreters, each with its libraries' work, beside the blocks
GRAM_BUDGET = "1.5GB" if FULL else "1GB"
LAYOUTS = {  # name: (chunks, compressed)
    "uncompressed (30, lat, lon)": ((30, -1, -1), False),
    "zlib4+shuffle (1, lat, lon)": ((1, -1, -1), True),
    "zlib4+shuffle (365, 23, 45)": ((365, 23, 45), True),
}


def _files(label: str) -> list[Path]:
    chunks, compressed = LAYOUTS[label]
    name = f"layout_{STEPS}_{DEGREES:g}_{'z' if compressed else 'u'}{'x'.join(map(str, chunks))}"
    return make_field(name, STEPS, DEGREES, FILES, chunks=chunks, compressed=compressed)


def _zarr_copy(paths: list[Path]) -> Path:
    import xarray as xr

    store = DATA / f"layout_{STEPS}_{DEGREES:g}.zarr"
    if not store.exists():
        with xr.open_mfdataset(paths, combine="by_coords") as ds, warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ds.chunk({"time": 30, "lat": -1, "lon": -1}).to_zarr(store, mode="w")
    return store


def plain_read(paths: list[Path]) -> float:
    """Seconds for one sequential read of every value, whole chunks along time at a time."""
    start = time.perf_counter()
    for path in paths:
        if str(path).endswith(".zarr"):
            import zarr

            array = zarr.open_group(str(path), mode="r")["tas"]
            step = array.chunks[0]
            for t in range(0, array.shape[0], step):
                array[t:t + step]
            continue
        with netCDF4.Dataset(path) as nc:
            variable = nc["tas"]
            variable.set_auto_mask(False)
            chunking = variable.chunking()
            step = chunking[0] if chunking != "contiguous" else 100
            for t in range(0, variable.shape[0], step):
                variable[t:t + step]
    return time.perf_counter() - start


BARE_JOB = """
import sys, time
import numpy as np
start = time.perf_counter()
paths = sys.argv[1:]
if paths[0].endswith(".zarr"):
    import zarr
    group = zarr.open_group(paths[0], mode="r")
    field, lat, time_days = group["tas"][:], group["lat"][:], group["time"][:]
else:
    import netCDF4
    days = []
    for path in paths:
        with netCDF4.Dataset(path) as nc:
            days.append(nc["time"][:]); lat, shape = nc["lat"][:], nc["tas"].shape
    time_days = np.concatenate(days)
    field, first = np.empty((time_days.size, *shape[1:]), dtype=np.float32), 0
    for path in paths:  # in the files' chunks along time: one whole-variable read is several times slower
        with netCDF4.Dataset(path) as nc:
            variable = nc["tas"]
            variable.set_auto_mask(False)
            chunking = variable.chunking()
            step = chunking[0] if chunking != "contiguous" else 100
            for t in range(0, variable.shape[0], step):
                part = variable[t:t + step]
                field[first:first + len(part)] = part
                first += len(part)
steps = field.shape[0]
field = field.reshape(steps, -1)
dates = np.datetime64("1900-01-01") + time_days.astype("timedelta64[D]")
months = dates.astype("datetime64[M]")
key = 100 * (months.astype(int) % 12 + 1) + (dates - months).astype(int) + 1
key[key == 229] = 228
rows = np.unique(key, return_inverse=True)[1]
climatology = np.stack([field[rows == r].mean(axis=0, dtype=np.float64) for r in range(rows.max() + 1)])
for first in range(0, steps, 64):
    field[first:first + 64] -= climatology[rows[first:first + 64]].astype(field.dtype)
field *= np.repeat(np.sqrt(np.cos(np.deg2rad(lat))), field.shape[1] // lat.size).astype(field.dtype)
omega = np.random.default_rng(0).standard_normal((field.shape[1], 16)).astype(field.dtype)
q = np.linalg.qr(field @ omega)[0]
q = np.linalg.qr(field @ (field.T @ q))[0]
np.linalg.svd(q.T @ field, full_matrices=False)
print(time.perf_counter() - start)
"""


STREAMED_JOB = """
import sys, time
import netCDF4
import numpy as np
start = time.perf_counter()
paths = sys.argv[1:]
pieces, days = [], []
for path in paths:
    with netCDF4.Dataset(path) as nc:
        variable = nc["tas"]
        chunking = variable.chunking()
        step = max(chunking[0] if chunking != "contiguous" else 1, 120)
        step = step if chunking == "contiguous" else -(-step // chunking[0]) * chunking[0]
        pieces += [(path, t, min(t + step, variable.shape[0])) for t in range(0, variable.shape[0], step)]
        days.append(nc["time"][:]); lat, shape = nc["lat"][:], variable.shape
dates = np.datetime64("1900-01-01") + np.concatenate(days).astype("timedelta64[D]")
months = dates.astype("datetime64[M]")
key = 100 * (months.astype(int) % 12 + 1) + (dates - months).astype(int) + 1
key[key == 229] = 228
rows = np.unique(key, return_inverse=True)[1]
points = shape[1] * shape[2]
weights = np.repeat(np.sqrt(np.cos(np.deg2rad(lat))), shape[2])
reads = [0]


def blocks():
    \"\"\"The field's blocks of whole chunks along time, in the files' order, each read once more.\"\"\"
    reads[0] += 1
    first = 0
    for path, t0, t1 in pieces:
        with netCDF4.Dataset(path) as nc:
            nc.set_auto_mask(False)
            values = nc["tas"][t0:t1].reshape(t1 - t0, points)
        yield slice(first, first + t1 - t0), values
        first += t1 - t0


sums, counts = np.zeros((rows.max() + 1, points)), np.bincount(rows)
for at, values in blocks():  # read 1: the climatology's sums
    np.add.at(sums, rows[at], values)
climatology = (sums / counts[:, None]).astype(np.float32)
del sums
scaled = weights.astype(np.float32)


def anomalies(at, values):
    values -= climatology[rows[at]]
    values *= scaled
    return values


omega = np.random.default_rng(0).standard_normal((points, 16)).astype(np.float32)
sample = np.empty((dates.size, 16), dtype=np.float32)
for at, values in blocks():  # read 2: A omega
    sample[at] = anomalies(at, values) @ omega
q = np.linalg.qr(sample)[0]
back = np.zeros((points, 16), dtype=np.float32)
for at, values in blocks():  # read 3: A^T Q, complete before it can be multiplied by A
    back += anomalies(at, values).T @ q[at]
for at, values in blocks():  # read 4: A (A^T Q)
    sample[at] = anomalies(at, values) @ back
q = np.linalg.qr(sample)[0]
small = np.zeros((16, points), dtype=np.float32)
for at, values in blocks():  # read 5: Q^T A
    small += q[at].T @ anomalies(at, values)
np.linalg.svd(small, full_matrices=False)
print(time.perf_counter() - start, reads[0])
"""


def streamed_job(paths: list[Path]) -> tuple[float, int]:
    """Seconds and reads of :data:`STREAMED_JOB` on NetCDF ``paths``: the same job streamed straight from the
    files in their own order with no copy (the order a run would need to skip the scratch copy), 5 reads."""
    seconds, reads = measured([*script(STREAMED_JOB), *map(str, paths)])[2].split()
    return float(seconds), int(reads)


def bare_job(paths: list[Path]) -> float:
    """Seconds of the bare numpy job (:data:`BARE_JOB`) on ``paths``, as timed inside its script."""
    return float(measured([*script(BARE_JOB), *map(str, paths)])[2])


def _config(paths: list[Path], memory: str, method: str, scheduler: str = "threads") -> Path:
    out = Path(tempfile.mkdtemp()) / "out"
    config = out.parent / "run.yaml"
    config.write_text(textwrap.dedent(f"""\
        input: {{paths: {[str(p) for p in paths]}, variable: tas}}
        modes: {{count: 6, method: {method}}}
        compute: {{memory: {memory}, scheduler: {scheduler}}}
        output: {{dir: {out}, figures: false}}
        """))
    return config


def _gb(nbytes: float) -> str:
    return f"{nbytes / 1e9:.2f} GB"


def _bytes(text: str) -> float:
    number, unit = re.fullmatch(r"([\d.]+)\s*([MG])B", text).groups()
    return float(number) * (1e9 if unit == "G" else 1e6)


def main() -> None:
    scratch = temporary_files_removed_at_exit()  # noqa: F841 (removed at exit)
    field_bytes = STEPS * len(np.arange(-90, 90 + 1e-9, DEGREES)) * len(np.arange(0, 360, DEGREES)) * 4
    print(f"{STEPS} daily steps, {DEGREES:g} degree grid ({_gb(field_bytes)} in float32, {FILES} files); "
          f"6 modes, day-of-year anomalies")
    inputs = {label: _files(label) for label in LAYOUTS}
    inputs["zarr copy of (1, lat, lon), chunks (30, lat, lon)"] = [_zarr_copy(inputs["zlib4+shuffle (1, lat, lon)"])]
    print("| layout | one read | bare numpy job | streamed, no copy | start-up | method, compute.memory, scheduler "
          "| read order | reads / passes | climodes run | target | run / bare job | peak memory |")
    print("|---|---|---|---|---|---|---|---|---|---|---|---|")
    for label, paths in inputs.items():
        plain_read(paths)  # into the page cache
        read = plain_read(paths)
        bare = bare_job(paths)
        streamed = "" if str(paths[0]).endswith(".zarr") else "{:.1f} s ({} reads)".format(*streamed_job(paths))
        startup = measured([CLIMODES, "check", str(_config(paths, BUDGETS[0], "randomized"))])[0]
        runs = [("randomized", b, "threads") for b in BUDGETS] + [("gram", GRAM_BUDGET, "threads")]
        if label.startswith("zlib"):
            runs.append(("randomized", PROCESSES_BUDGET, "processes"))
        trained = None  # the first run's folder, kept for the projection
        for method, memory, scheduler in runs:
            config = _config(paths, memory, method, scheduler)
            seconds, peak, _ = measured([CLIMODES, "run", "--quiet", str(config)])
            log = (config.parent / "out" / "run.log").read_text()
            passes = re.search(r"converged in (\d) passes", log)
            passes = int(passes.group(1)) if passes else 2
            order = re.search(r"read order: (the files read once|blocks of latitude rows)[^\n]*?"
                              r"(in memory|in an uncompressed scratch copy)?\n", log)
            once = order.group(1).startswith("the files")
            where = (order.group(2) or "scratch").replace("in an uncompressed ", "") if once else "rows"
            reads = 1 if once else passes
            target = 1.5 * reads * read + startup
            print(f"| {label} | {read:.1f} s | {bare:.1f} s | {streamed} | {startup:.1f} s | {method}, {memory}, {scheduler} "
                  f"| {where} | {reads} / {passes} | {seconds:.1f} s | {'met' if seconds <= target else 'not met'} "
                  f"({target:.1f} s) | {seconds / bare:.1f}x | {_gb(peak)} of {_gb(_bytes(memory))} |", flush=True)
            if trained is None:
                trained = config.parent
            else:
                shutil.rmtree(config.parent)
        _projection(label, paths, trained, read, startup)
        shutil.rmtree(trained)


def _projection(label: str, paths: list[Path], trained: Path, read: float, startup: float) -> None:
    """``climodes project`` of the same files onto the modes of ``trained``: one read of the files."""
    config = _config(paths, BUDGETS[0], "randomized")
    seconds, peak, _ = measured([CLIMODES, "project", "--quiet", str(trained / "out"), str(config)])
    order = re.search(r"read order: ([^\n]*)", (config.parent / "out" / "projection.log").read_text()).group(1)
    where = "time blocks" if "files' own order" in order else "slabs" if "slab(s)" in order else "rows"
    target = 1.5 * read + startup
    print(f"| {label} | {read:.1f} s | | | {startup:.1f} s | project, {BUDGETS[0]}, threads | {where} | 1 / 1 "
          f"| {seconds:.1f} s | {'met' if seconds <= target else 'not met'} ({target:.1f} s) | "
          f"| {_gb(peak)} of {_gb(_bytes(BUDGETS[0]))} |", flush=True)
    shutil.rmtree(config.parent)


if __name__ == "__main__":
    main()
