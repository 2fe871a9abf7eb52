"""climodes against reference implementations, measured in the same run: `make bench`.

Prints wall time, peak resident memory of the whole process tree and the ratios the project targets.
Fields are generated on first use into benchmarks/data/ (about 5 GB for all sizes).

References, each timed here on the same files: the `eofs` package (full SVD in memory), scikit-learn's
PCA (full and randomized solvers), dask's `svd_compressed`, and a bare numpy lower bound (read once,
cross-product, eigh), also with the files read through xarray and dask.

The 3.8 GB daily field is also run on a 2-worker local dask cluster (compute.scheduler: processes) beside
the threads, with the bytes each pass moved between processes, as the run logs them.

Usage: python benchmarks/run.py [--quick | --cluster]   (--quick: skip the 3.8 GB daily field;
       --cluster: only the threads / local cluster comparison on it)
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import textwrap
import threading
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).parent))
from fields import DATA, make_field, temporary_files_removed_at_exit  # noqa: E402

PYTHON = sys.executable
CLIMODES = str(Path(PYTHON).parent / "climodes")


def _tree_rss(pid: int) -> int:
    """Resident bytes of a process and all its descendants, from /proc."""
    total, todo = 0, [pid]
    while todo:
        p = todo.pop()
        try:
            with open(f"/proc/{p}/status") as f:
                total += next(int(line.split()[1]) * 1024 for line in f if line.startswith("VmRSS:"))
            for task in os.listdir(f"/proc/{p}/task"):
                with open(f"/proc/{p}/task/{task}/children") as f:
                    todo.extend(int(c) for c in f.read().split())
        except (OSError, StopIteration):
            continue
    return total


def measured(command: list[str]) -> tuple[float, int, str]:
    """Run ``command``; return its wall time, the peak RSS of its process tree, and its stdout."""
    start = time.perf_counter()
    proc = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = [0]

    def watch():
        while proc.poll() is None:
            peak[0] = max(peak[0], _tree_rss(proc.pid))
            time.sleep(0.02)

    watcher = threading.Thread(target=watch)
    watcher.start()
    out, err = proc.communicate()
    watcher.join()
    seconds = time.perf_counter() - start
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(command)} failed:\n{err[-3000:]}")
    return seconds, peak[0], out


def script(code: str) -> list[str]:
    path = Path(tempfile.mkdtemp()) / "bench.py"
    path.write_text(textwrap.dedent(code))
    return [PYTHON, str(path)]


def climodes_run(paths: list[Path], memory: str, count: int = 10, **compute) -> tuple[float, int, Path]:
    out = Path(tempfile.mkdtemp()) / "out"
    config = out.parent / "run.yaml"
    compute_keys = "".join(f", {key}: {value}" for key, value in compute.items())
    config.write_text(textwrap.dedent(f"""\
        input: {{paths: {json.dumps([str(p) for p in paths])}, variable: tas}}
        modes: {{count: {count}}}
        compute: {{memory: {memory}{compute_keys}}}
        output: {{dir: {out}, figures: false}}
        """))
    seconds, peak, _ = measured([CLIMODES, "run", "--quiet", str(config)])
    return seconds, peak, out


def eofs_script(paths: list[Path], count: int = 10) -> list[str]:
    """The same job with eofs: read, monthly anomalies, sqrt(cos) weights, EOFs, write NetCDF."""
    return script(f"""
        import json, time
        import numpy as np, xarray as xr
        from eofs.standard import Eof
        ds = xr.open_mfdataset({json.dumps([str(p) for p in paths])}, combine="by_coords")
        field = ds["tas"].load()
        anomaly = field.groupby("time.month") - field.groupby("time.month").mean("time")
        weights = np.sqrt(np.cos(np.deg2rad(field["lat"].values)))[:, None] * np.ones(field.sizes["lon"])
        start = time.perf_counter()
        solver = Eof(anomaly.values, weights=weights)
        maps = solver.eofsAsCovariance(neofs={count}, pcscaling=1)
        pcs = solver.pcs(npcs={count}, pcscaling=1)
        fraction = solver.varianceFraction({count})
        seconds = time.perf_counter() - start
        xr.Dataset({{"eof": (("mode", "lat", "lon"), maps), "pc": (("time", "mode"), pcs)}}).to_netcdf(
            "{tempfile.mkdtemp()}/eofs.nc")
        print(json.dumps({{"decomposition": seconds}}))
        """)


def numpy_bound_script(paths: list[Path]) -> list[str]:
    """The lower bound as a whole script: read once, centre, cross-product, eigh."""
    return script(f"""
        import netCDF4, numpy as np
        x = np.concatenate([netCDF4.Dataset(p)["tas"][:].filled(np.nan) for p in {json.dumps([str(p) for p in paths])}])
        x = x.reshape(x.shape[0], -1)
        x -= x.mean(axis=0)
        values, vectors = np.linalg.eigh((x @ x.T).astype(np.float64))
        """)


def xarray_bound_script(paths: list[Path]) -> list[str]:
    """The same lower bound with the files read through xarray and dask, the stack climodes is built on."""
    return script(f"""
        import dask.array, numpy as np, xarray as xr
        x = xr.open_mfdataset({json.dumps([str(p) for p in paths])}, combine="by_coords")["tas"].values
        x = x.reshape(x.shape[0], -1)
        x -= x.mean(axis=0)
        values, vectors = np.linalg.eigh((x @ x.T).astype(np.float64))
        """)


def read_once_script(paths: list[Path]) -> list[str]:
    return script(f"""
        import netCDF4, numpy as np
        total = 0.0
        for p in {json.dumps([str(p) for p in paths])}:
            with netCDF4.Dataset(p) as nc:
                v = nc["tas"]
                for start in range(0, v.shape[0], 100):
                    total += float(v[start:start + 100].sum())
        """)


def dask_svd_script(paths: list[Path], count: int = 10) -> list[str]:
    return script(f"""
        import dask, dask.array as da, numpy as np, xarray as xr
        ds = xr.open_mfdataset({json.dumps([str(p) for p in paths])}, combine="by_coords", chunks={{"time": 365}})
        x = ds["tas"].data
        x = x.reshape(x.shape[0], -1).rechunk({{0: -1, 1: 2**14}})
        w = da.from_array(np.repeat(np.sqrt(np.cos(np.deg2rad(ds["lat"].values))), ds.sizes["lon"]),
                          chunks=x.chunks[1])
        x = (x - x.mean(axis=0)) * w
        u, s, v = da.linalg.svd_compressed(x, k={count}, n_power_iter=2, seed=0)
        dask.compute(u, s, v)
        """)


def in_memory_decompositions(paths: list[Path], count: int = 10) -> dict[str, float]:
    """Decomposition alone, on the same in-memory weighted anomaly matrix, in this process."""
    import eofs.standard
    import netCDF4
    import xarray as xr
    from sklearn.decomposition import PCA

    from climodes.solvers import SolverPlan, solve
    from climodes.weights import area_weights

    field = np.concatenate([netCDF4.Dataset(p)["tas"][:].filled(np.nan) for p in paths])
    with netCDF4.Dataset(paths[0]) as nc:
        lat, lon = nc["lat"][:].data, nc["lon"][:].data
    field -= field.mean(axis=0)
    anomaly = xr.DataArray(field, dims=("time", "lat", "lon"),
                           coords={"time": np.arange(field.shape[0]), "lat": lat, "lon": lon})
    weights = area_weights(anomaly["lat"], anomaly["lon"], "coslat")
    flat = (field * weights.values).reshape(field.shape[0], -1).astype(np.float64)
    times = {}

    def clock(name, function):
        start = time.perf_counter()
        function()
        times[name] = time.perf_counter() - start

    clock("climodes gram", lambda: solve(anomaly, weights, count, 0.1, SolverPlan("gram", "bench", 30)))
    clock("climodes randomized", lambda: solve(anomaly, weights, count, 0.1, SolverPlan("randomized", "bench", 30)))
    clock("eofs", lambda: eofs.standard.Eof(field, weights=weights.values).eofsAsCovariance(neofs=count))
    clock("scikit-learn PCA full", lambda: PCA(count, svd_solver="full").fit(flat))
    clock("scikit-learn PCA randomized", lambda: PCA(count, svd_solver="randomized", random_state=0).fit(flat))
    return times


def recovery(out: Path, patterns_file: Path) -> list[float]:
    """|area-weighted pattern correlation| of each planted pattern with the best-matching EOF."""
    import xarray as xr

    planted = np.load(patterns_file)
    ds = xr.open_dataset(out / "modes.nc")
    w = np.sqrt(np.cos(np.deg2rad(ds["lat"].values)))[:, None]
    found = [(ds["eof"].values[k] * w).ravel() for k in range(ds.sizes["mode"])]
    scores = []
    for p in planted:
        target = (p * w).ravel()
        scores.append(max(abs(np.corrcoef(target, f)[0, 1]) for f in found[:5]))
    return scores


def _gb(nbytes: int) -> str:
    return f"{nbytes / 1e9:.2f} GB"


def threads_and_local_cluster(daily: list[Path]) -> None:
    """The daily field on 2 threads and on a 2-worker local dask cluster, memory 2GB each, and what each pass
    of the cluster run moved between processes (from its run.log)."""
    print("  threads against a local dask cluster of 2 worker processes (compute.memory 2GB, 2 workers):")
    runs = {}
    for scheduler in ("threads", "processes"):
        seconds, peak, out = climodes_run(daily, "2GB", scheduler=scheduler, workers=2)
        runs[scheduler] = (seconds, out)
        print(f"    {scheduler:<10} {seconds:7.2f} s   peak {_gb(peak)} (whole process tree)")
    print(f"    local cluster / threads            {runs['processes'][0] / runs['threads'][0]:5.2f}x")
    log = (runs["processes"][1] / "run.log").read_text().splitlines()
    print("    moved between processes, per pass (field: 3.80 GB):")
    for line in log:
        if line.startswith("moved: "):
            print(f"      {line.removeprefix('moved: ')}")
    import xarray as xr

    a, b = (xr.open_dataset(runs[s][1] / "modes.nc") for s in ("threads", "processes"))
    print(f"    largest difference of the maps, relative: {float(abs(a.eof - b.eof).max() / abs(a.eof).max()):.1e}")


def main() -> None:
    quick = "--quick" in sys.argv
    scratch = temporary_files_removed_at_exit()  # noqa: F841 (removed at exit)
    print(f"machine: {os.cpu_count()} cores, {os.sysconf('SC_PAGE_SIZE') * os.sysconf('SC_PHYS_PAGES') / 2**30:.0f} GiB,"
          f" python {sys.version.split()[0]}")
    if "--cluster" in sys.argv:
        print("\n== 3,650 daily steps x 259,920 points (0.5 degree, float32, 10 files, 3.8 GB) ==")
        threads_and_local_cluster(make_field("daily_halfdeg", 3650, 0.5, 10))
        return

    print("\n== 720 monthly steps x 65,160 points (1 degree, float32, 6 files) ==")
    monthly = make_field("monthly_1deg", 720, 1.0, 6)
    print("  (the three quick ones: median of 3 runs, taken in turn)")
    rows = []
    runs = [(climodes_run(monthly, "4GB"), measured(numpy_bound_script(monthly)),
             measured(xarray_bound_script(monthly))) for _ in range(3)]
    (t_run, m_run), (t_np, m_np), (t_xr, m_xr) = (
        (float(np.median([r[i][0] for r in runs])), max(r[i][1] for r in runs)) for i in range(3))
    out = runs[0][0][2]
    rows.append(("climodes run (figures off)", t_run, m_run))
    t_eofs, m_eofs, printed = measured(eofs_script(monthly))
    eofs_decomposition = json.loads(printed.strip().splitlines()[-1])["decomposition"]
    rows.append(("eofs script, same job", t_eofs, m_eofs))
    rows.append(("numpy lower bound script", t_np, m_np))
    rows.append(("same, read via xarray + dask", t_xr, m_xr))
    t_dask, m_dask, _ = measured(dask_svd_script(monthly))
    rows.append(("dask svd_compressed script", t_dask, m_dask))
    for name, seconds, peak in rows:
        print(f"  {name:<32} {seconds:7.2f} s   peak {_gb(peak)}")
    decompositions = in_memory_decompositions(monthly)
    print("  decomposition alone, same in-memory matrix:")
    for name, seconds in decompositions.items():
        print(f"    {name:<30} {seconds:7.2f} s")
    print("  ratios (target):")
    print(f"    eofs / climodes gram, decomposition   {eofs_decomposition / decompositions['climodes gram']:6.1f}x"
          "  (>= 10x)")
    print(f"    eofs script / climodes run            {t_eofs / t_run:6.1f}x  (>= 8x)")
    print(f"    climodes run / numpy lower bound      {t_run / t_np:6.1f}x  (<= 2x)")
    print(f"    xarray + dask bound / numpy bound     {t_xr / t_np:6.1f}x  (the stack's own share)")
    print(f"    climodes run / xarray + dask bound    {t_run / t_xr:6.1f}x")
    print(f"  planted patterns recovered, |r|: {', '.join(f'{r:.4f}' for r in recovery(out, DATA / 'monthly_1deg' / 'patterns.npy'))}")

    print("\n== cost against grid points, 720 steps (median of 3 runs each) ==")
    print("  points    climodes run   s per million points   added s per added million points")
    previous = None
    for name, step in (("monthly_2deg", 2.0), ("monthly_1deg", 1.0), ("monthly_halfdeg", 0.5)):
        paths = make_field(name, 720, step, 6)
        seconds = float(np.median([climodes_run(paths, "4GB")[0] for _ in range(3)]))
        points = len(np.arange(-90, 90 + 1e-9, step)) * len(np.arange(0, 360, step))
        marginal = "" if previous is None else f"{(seconds - previous[1]) / (points - previous[0]) * 1e6:8.2f}"
        print(f"  {points:>7}   {seconds:9.2f} s   {seconds / points * 1e6:8.2f}               {marginal}")
        previous = (points, seconds)

    print("\n== a sea field: 720 steps x 259,920 points, a third of them land (0.75 GB) ==")
    sea = make_field("monthly_halfdeg_sea", 720, 0.5, 6, sea=True)
    t_sea, m_sea, _ = climodes_run(sea, "4GB")
    t_tight, m_tight, _ = climodes_run(sea, "500MB")
    print(f"  climodes run, memory 4GB         {t_sea:7.2f} s   peak {_gb(m_sea)}   (all points land-free: "
          f"{previous[1]:.2f} s above)")
    print(f"  climodes run, memory 500MB       {t_tight:7.2f} s   peak {_gb(m_tight)}   within budget: "
          f"{'yes' if m_tight <= 500e6 else 'NO'}")

    if quick:
        return
    print("\n== 3,650 daily steps x 259,920 points (0.5 degree, float32, 10 files, 3.8 GB) ==")
    daily = make_field("daily_halfdeg", 3650, 0.5, 10)
    t_read, m_read, _ = measured(read_once_script(daily))
    print(f"  one read pass                    {t_read:7.2f} s   peak {_gb(m_read)}")
    t_run, m_run, out = climodes_run(daily, "2GB")
    print(f"  climodes run, memory 2GB         {t_run:7.2f} s   peak {_gb(m_run)}   (target: peak <= 2.5 GB)")
    t_dask, m_dask, _ = measured(dask_svd_script(daily))
    print(f"  dask svd_compressed script       {t_dask:7.2f} s   peak {_gb(m_dask)}")
    print(f"  dask / climodes                  {t_dask / t_run:7.1f}x  (target > 1)")
    print(f"  planted patterns recovered, |r|: {', '.join(f'{r:.4f}' for r in recovery(out, DATA / 'daily_halfdeg' / 'patterns.npy'))}")
    t_small, m_small, _ = climodes_run(daily, "1.2GB")
    print(f"  climodes run, memory 1.2GB (field 3.2x the budget) {t_small:7.2f} s   peak {_gb(m_small)}"
          f"   within budget: {'yes' if m_small <= 1.2e9 else 'NO'}")
    threads_and_local_cluster(daily)


if __name__ == "__main__":
    main()
