"""Shared helpers: small NetCDF fields written on the fly, configs, and the CLI run in-process."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
import yaml

from climodes.cli import main


def field_dataset(values: np.ndarray, lat: np.ndarray, lon: np.ndarray, time=None, name: str = "tas",
                  units: str = "K") -> xr.Dataset:
    """A CF-described (time, lat, lon) field as an archive would store it."""
    if time is None:
        time = pd.date_range("1980-01-15", periods=values.shape[0], freq="MS") + pd.Timedelta(days=14)
    return xr.Dataset(
        {name: (("time", "lat", "lon"), values, {"units": units, "long_name": "test field"})},
        coords={
            "time": ("time", time, {"standard_name": "time", "axis": "T"}),
            "lat": ("lat", lat, {"standard_name": "latitude", "units": "degrees_north"}),
            "lon": ("lon", lon, {"standard_name": "longitude", "units": "degrees_east"}),
        },
    )


def red_field(shape: tuple[int, int, int], seed: int = 0) -> np.ndarray:
    """Random field with a few spatially coherent, well-separated modes plus noise."""
    rng = np.random.default_rng(seed)
    nt, ny, nx = shape
    out = 0.3 * rng.standard_normal(shape)
    for k, amp in enumerate([4.0, 2.5, 1.5]):
        pattern = rng.standard_normal((ny, nx)).cumsum(0).cumsum(1)
        pattern /= np.abs(pattern).max()
        out += amp * rng.standard_normal(nt)[:, None, None] * pattern
    return out


def tiled_half_degree_files(folder: Path, steps: int, parts: int, chunks: tuple[int, int, int]) -> list[Path]:
    """A big monthly field of noise about 280 K on a 0.5 degree grid, ``steps`` long in ``parts`` files
    compressed in tiles of ``chunks`` (time, lat, lon), written a file at a time."""
    lat, lon = np.linspace(-89.5, 89.5, 180), np.arange(0, 360, 0.5)
    rng = np.random.default_rng(0)
    paths = []
    for part in range(parts):
        values = (280 + rng.standard_normal((steps // parts, lat.size, lon.size), dtype=np.float32)).astype(np.float32)
        time = xr.date_range(f"{1900 + -(-steps // parts // 12) * part}-01-01", periods=steps // parts, freq="MS")
        paths.append(folder / f"tiles{part}.nc")
        field_dataset(values, lat, lon, time=time).to_netcdf(
            paths[-1], encoding={"tas": {"zlib": True, "complevel": 1, "chunksizes": chunks}})
        del values
    return paths


def write_config(folder: Path, files, variable: str = "tas", **sections) -> Path:
    """Write a config for ``files`` with any section overrides; return its path."""
    body = {"input": {"paths": [str(f) for f in files], "variable": variable},
            "output": {"dir": str(folder / "out"), "figures": False}}
    for section, values in sections.items():
        body.setdefault(section, {}).update(values)
    path = folder / "run.yaml"
    path.write_text(yaml.safe_dump(body, sort_keys=False))
    return path


@pytest.fixture
def cli(capsys):
    """Run ``climodes ARGS`` in-process; return (exit code, stdout, stderr)."""

    def call(*args: str) -> tuple[int, str, str]:
        code = main([str(a) for a in args])
        out = capsys.readouterr()
        return code, out.out, out.err

    return call


@pytest.fixture
def fresh_process(monkeypatch):
    """Memory plans made as in a climodes process of its own, which holds about 0.2 GB before it reads
    (README, compute.memory), not as in this test session, which holds more the more tests have run before."""
    monkeypatch.setattr("climodes.cluster.resident_bytes", lambda: int(0.2e9))


@pytest.fixture
def small_field(tmp_path) -> Path:
    """A 10-degree global field of 60 months, stored in one file."""
    lat = np.arange(-85.0, 90, 10)
    lon = np.arange(5.0, 360, 10)
    path = tmp_path / "field.nc"
    field_dataset(red_field((60, lat.size, lon.size)), lat, lon).to_netcdf(path)
    return path


@pytest.fixture
def values_read(monkeypatch):
    """Count the data values read from NetCDF files (through xarray's netCDF4 backend), but those of a results
    file (``modes.nc``, which the report and the checks of a finished run read back)."""
    from xarray.backends.netCDF4_ import NetCDF4ArrayWrapper

    counter = {"values": 0}
    original = NetCDF4ArrayWrapper._getitem

    def counting(self, key):
        array = original(self, key)
        if np.ndim(array) >= 2 and Path(self.datastore._filename).name != "modes.nc":  # field reads, not coordinates
            counter["values"] += int(np.size(array))
        return array

    monkeypatch.setattr(NetCDF4ArrayWrapper, "_getitem", counting)
    return counter


def cf_strict(path: Path) -> subprocess.CompletedProcess:
    """Run the IOOS compliance-checker on ``path``: CF-1.10, strict criteria (exit 0 when it passes)."""
    tool = shutil.which("compliance-checker") or str(Path(sys.executable).parent / "compliance-checker")
    return subprocess.run([tool, "-t", "cf:1.10", "-c", "strict", str(path)], capture_output=True, text=True,
                          timeout=300)


def archive_file(path: Path, steps: int = 24, lat: np.ndarray | None = np.linspace(-40, 40, 5),
                 lon: np.ndarray | None = np.arange(0, 60.0, 10), time_units: str | None = "days since 2000-01-01",
                 calendar: str | None = None, first_day: float = 15.0, units: str | None = "K",
                 coord_attrs: dict | None = None, seed: int = 0) -> Path:
    """A (time, lat, lon) field written with netCDF4 as an archive writes it, its defects included.

    ``lat`` or ``lon`` ``None`` writes that dimension without a coordinate
    variable; ``time_units`` or ``units`` ``None`` writes no units;
    ``coord_attrs`` adds attributes to coordinate variables, e.g.
    ``{"lat": {"actual_range": [-90, 90]}}``.  Steps are 30 days apart from
    ``first_day``; the field is :func:`red_field` noise.
    """
    import netCDF4

    ny = 5 if lat is None else len(lat)
    nx = 6 if lon is None else len(lon)
    with netCDF4.Dataset(path, "w") as nc:
        for name, size in (("time", steps), ("lat", ny), ("lon", nx)):
            nc.createDimension(name, size)
        time = nc.createVariable("time", "f8", ("time",))
        time.standard_name = "time"
        if time_units is not None:
            time.units = time_units
        if calendar is not None:
            time.calendar = calendar
        time[:] = first_day + 30.0 * np.arange(steps)
        for name, values, axis_units in (("lat", lat, "degrees_north"), ("lon", lon, "degrees_east")):
            if values is not None:
                coord = nc.createVariable(name, "f8", (name,))
                coord.units = axis_units
                coord[:] = values
        for name, attrs in (coord_attrs or {}).items():
            nc[name].setncatts(attrs)
        field = nc.createVariable("tas", "f4", ("time", "lat", "lon"))
        if units is not None:
            field.units = units
        field[:] = red_field((steps, ny, nx), seed) + 280
    return path


@pytest.fixture(scope="session")
def slurm():
    """A single-node SLURM on this machine, started once for the whole test session (tests/slurm_node.py);
    its client commands find it through SLURM_CONF.  Skipped, with the reason, where it cannot start."""
    import os

    import slurm_node

    reason = slurm_node.why_not()
    if reason:
        pytest.skip(f"no SLURM node for the batch-scheduler tests: {reason}")
    node = slurm_node.start()
    before = os.environ.get("SLURM_CONF")
    os.environ["SLURM_CONF"] = str(node.conf)
    yield node
    if before is None:
        os.environ.pop("SLURM_CONF", None)
    else:
        os.environ["SLURM_CONF"] = before
    node.stop()
