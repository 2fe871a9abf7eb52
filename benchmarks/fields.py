"""Benchmark fields: multi-file float32 NetCDF with planted modes, generated on first use.

A field is a few smooth planted patterns times red-noise PCs, plus white noise, on a regular global
grid, split into files along time; the planted patterns are kept beside the files to check recovery.
A sea field has a third of its points missing at every step (invented blocky continents).
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import netCDF4
import numpy as np

DATA = Path(__file__).parent / "data"
AMPLITUDES = np.array([6.0, 4.0, 2.5])


def temporary_files_removed_at_exit() -> tempfile.TemporaryDirectory:
    """Send this process's and its children's temporary files (scripts, results folders, climodes' scratch
    copies) into one folder, removed when the benchmark ends; keep the returned object while it runs."""
    folder = tempfile.TemporaryDirectory(prefix="climodes-bench-")
    os.environ["TMPDIR"] = tempfile.tempdir = folder.name
    return folder


def grid(step: float) -> tuple[np.ndarray, np.ndarray]:
    return np.arange(-90, 90 + 1e-9, step), np.arange(0, 360, step)


def planted_patterns(lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    lon2d, lat2d = np.meshgrid(np.deg2rad(lon), np.deg2rad(lat))
    return np.stack([
        np.exp(-((np.rad2deg(lat2d) / 15) ** 2)) * np.cos(lon2d - 3.5),
        np.sin(2 * lat2d) * np.cos(2 * lon2d),
        np.cos(lat2d) ** 2 * np.sin(3 * lon2d + 1.0),
    ]).astype(np.float32)


def _planted_pcs(rng: np.random.Generator, days: np.ndarray, monthly: bool) -> np.ndarray:
    """Red-noise PCs made exactly orthonormal to each other and to the calendar means a climatology
    removes, so the planted modes are the field's exact modes once anomalies are taken."""
    steps = days.size
    pcs = np.zeros((steps, 3))
    for t in range(1, steps):
        pcs[t] = 0.8 * pcs[t - 1] + 0.6 * rng.standard_normal(3)
    dates = np.datetime64("1900-01-01") + days.astype("timedelta64[D]")
    if monthly:
        keys = dates.astype("datetime64[M]").astype(int) % 12
    else:
        keys = (dates - dates.astype("datetime64[Y]")).astype(int)
    design = (keys[:, None] == np.unique(keys)[None, :]).astype(float)
    pcs -= design @ np.linalg.lstsq(design, pcs, rcond=None)[0]
    q, _ = np.linalg.qr(pcs)
    return q * np.sqrt(steps - 1)


def land(lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    """A third of the grid as land: blocks of about 20 x 15 degrees in a staggered pattern."""
    rows, cols = np.meshgrid(np.arange(lat.size), np.arange(lon.size), indexing="ij")
    step = 360 / lon.size
    return (np.floor(cols * step / 20) + np.floor(rows * step / 15)) % 3 == 0


def make_field(name: str, steps: int, step_deg: float, files: int, seed: int = 0, sea: bool = False,
               chunks: tuple[int, int, int] | None = None, compressed: bool = False) -> list[Path]:
    """Write (once) ``files`` NetCDF files of a ``steps`` x grid field; return their paths.

    ``chunks`` (time, lat, lon; -1 for the whole axis) stores the field in chunks, zlib level 4 with the
    shuffle filter when ``compressed``; by default it is stored contiguously, uncompressed."""
    folder = DATA / name
    paths = [folder / f"{name}_{i:02d}.nc" for i in range(files)]
    if all(p.exists() for p in paths):
        return paths
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    lat, lon = grid(step_deg)
    patterns = planted_patterns(lat, lon)
    days = np.arange(steps) * (365.25 / 12 if steps <= 1200 else 1.0)
    pcs = _planted_pcs(rng, days, monthly=steps <= 1200)
    per_file = -(-steps // files)
    for i, path in enumerate(paths):
        first, last = i * per_file, min(steps, (i + 1) * per_file)
        with netCDF4.Dataset(path, "w") as nc:
            nc.createDimension("time", last - first)
            nc.createDimension("lat", lat.size)
            nc.createDimension("lon", lon.size)
            t = nc.createVariable("time", "f8", ("time",))
            t.units, t.calendar, t.standard_name = "days since 1900-01-01", "standard", "time"
            t[:] = days[first:last]
            for axis, values, units in (("lat", lat, "degrees_north"), ("lon", lon, "degrees_east")):
                v = nc.createVariable(axis, "f8", (axis,))
                v.units, v.standard_name = units, {"lat": "latitude", "lon": "longitude"}[axis]
                v[:] = values
            if chunks is None:
                layout = {"contiguous": True}
            else:
                whole = (last - first, lat.size, lon.size)
                layout = {"chunksizes": tuple(min(n, c if c > 0 else n) for c, n in zip(chunks, whole)),
                          "zlib": compressed, "complevel": 4 if compressed else 0, "shuffle": compressed}
            field = nc.createVariable("tas", "f4", ("time", "lat", "lon"), **layout)
            field.units = "K"
            for start in range(first, last, 100):
                stop = min(last, start + 100)
                chunk = np.einsum("tk,k,kyx->tyx", pcs[start:stop], AMPLITUDES, patterns).astype(np.float32)
                chunk += rng.standard_normal(chunk.shape, dtype=np.float32)
                if sea:
                    chunk[:, land(lat, lon)] = np.nan
                field[start - first:stop - first] = chunk
    np.save(folder / "patterns.npy", patterns)
    return paths
