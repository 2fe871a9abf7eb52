"""Projecting a field compressed in spatial tiles: read in slabs of whole chunks along time, each tile
decompressed once, and worked on a few steps at a time.

References: the projection formula of the README and its identity for the training field
(``X X^T pc_k = (n - 1) lambda_k pc_k``: the training field projected onto its own EOFs gives its own
PCs, an identity of the SVD); the same formula computed here with plain numpy, on anomalies made here from
the values written (a monthly climatology, sqrt(cos(lat)) area weights: common practice, and the README's
defaults); netCDF4-python's ``Variable.chunking()`` for the tiles the file was written with.
"""

import re

import netCDF4
import numpy as np
import pandas as pd
import pytest
import xarray as xr

import climodes.reuse
from climodes.reuse import PROJECT_BYTES_PER_VALUE, plan_projection
from climodes.solvers import LIBRARY_WORK
from climodes.storage import SLAB_BYTES_PER_VALUE, Storage
from conftest import red_field, tiled_half_degree_files, write_config

STEPS, LAT, LON = 96, np.linspace(-60, 60, 25), np.arange(0, 360, 10.0)
TILES = (24, 5, 9)  # 4 slabs of 24 months, each 5 x 4 tiles of 5 rows x 9 columns


@pytest.fixture(scope="module")
def values() -> np.ndarray:
    values = (280 + red_field((STEPS, LAT.size, LON.size), 7)).astype(np.float32)
    values[:, 2:4, 5:9] = np.nan  # land: missing at every step
    values[5::13, 10, 10] = np.nan  # a gappy point: 7 steps of 96, all in other months
    return values


@pytest.fixture(scope="module")
def tiled(tmp_path_factory, values):
    """The field written with netCDF4 in zlib-compressed tiles smaller than the grid."""
    path = tmp_path_factory.mktemp("tiled") / "tiled.nc"
    days = (pd.date_range("1990-01-01", periods=STEPS, freq="MS") - pd.Timestamp("1990-01-01")).days + 14
    with netCDF4.Dataset(path, "w") as nc:
        for name, size in (("time", STEPS), ("lat", LAT.size), ("lon", LON.size)):
            nc.createDimension(name, size)
        time = nc.createVariable("time", "f8", ("time",))
        time.setncatts({"standard_name": "time", "units": "days since 1990-01-01", "calendar": "standard"})
        time[:] = days.values
        for name, coord, units in (("lat", LAT, "degrees_north"), ("lon", LON, "degrees_east")):
            variable = nc.createVariable(name, "f8", (name,))
            variable.units = units
            variable[:] = coord
        field = nc.createVariable("tas", "f4", ("time", "lat", "lon"), zlib=True, complevel=4, chunksizes=TILES,
                                  fill_value=np.float32(1e20))
        field.units = "K"
        field[:] = np.ma.masked_invalid(values)
    with netCDF4.Dataset(path) as nc:
        assert nc["tas"].chunking() == list(TILES) and nc["tas"].filters()["zlib"]
    return path


@pytest.fixture(scope="module")
def trained(tmp_path_factory, tiled):
    """A Gram run on the tiled field itself (monthly climatology, the default preparation)."""
    from climodes.cli import main

    folder = tmp_path_factory.mktemp("trained")
    assert main(["run", "--quiet", str(write_config(folder, [tiled], modes={"count": 3, "method": "gram"}))]) == 0
    return folder


@pytest.fixture
def tile_reads(monkeypatch):
    """Count, for each tile of the field's variable, the reads that met it (xarray's netCDF4 backend): a
    read that meets part of a compressed tile needs all of it decompressed, unless the file's chunk cache
    still holds it, so once each means each tile decompressed once at most."""
    from xarray.backends.netCDF4_ import NetCDF4ArrayWrapper

    counts: dict[tuple[int, int, int], int] = {}
    original = NetCDF4ArrayWrapper._getitem

    def counting(self, key):
        variable = self.get_array()
        if variable.name == "tas":
            chunks = variable.chunking()
            spans = [range(*k.indices(n)) if isinstance(k, slice) else np.atleast_1d(k)
                     for k, n in zip(key, variable.shape)]
            met = [sorted({int(i) // c for i in span}) for span, c in zip(spans, chunks)]
            for tile in ((a, b, c) for a in met[0] for b in met[1] for c in met[2]):
                counts[tile] = counts.get(tile, 0) + 1
        return original(self, key)

    monkeypatch.setattr(NetCDF4ArrayWrapper, "_getitem", counting)
    return counts


def _project(cli, trained, tiled, folder):
    folder.mkdir()
    code, _, err = cli("project", trained / "out", write_config(folder, [tiled], compute={"memory": "302MB"}))
    assert code == 0, err
    with xr.open_dataset(folder / "out" / "projection.nc") as ds:
        return ds.load(), (folder / "out" / "projection.log").read_text()


def test_a_tiled_field_projects_in_slabs_reading_each_tile_once(tmp_path, cli, trained, tiled, values, tile_reads,
                                                               monkeypatch, fresh_process):
    """In slabs of whole chunks along time every tile is read once, and the projection, worked on pieces of
    a few steps of each slab (a budget just above the least), is the row order's to rounding (1e-12 of the
    largest value), the training run's own PCs (SVD identity, to 1e-9) and the README's formula
    ``sum_x a w^2 eof_k / lambda_k`` computed here with numpy (to 1e-9)."""
    tiles = np.prod([-(-n // c) for n, c in zip(values.shape, TILES)])
    slabs, log = _project(cli, trained, tiled, tmp_path / "slabs")
    order = re.search(r"read order: ([^\n]*)", log).group(1)
    assert order.startswith("4 slab(s) of 24 time steps x every row") and "latitude rows" not in order
    assert 1 < int(re.search(r"worked on (\d+) step", order).group(1)) < 24  # several pieces a slab
    assert "each chunk of the files decompressed once" in order and "fits compute.memory" in order
    assert len(tile_reads) == tiles and set(tile_reads.values()) == {1}  # each tile read once
    assert "set 7 missing values at 1 points to zero anomaly" in log  # counted over every piece

    tile_reads.clear()
    monkeypatch.setattr(climodes.reuse, "SLAB_BYTES_PER_VALUE", 1e6)  # no slab fits: the row order
    rows, log = _project(cli, trained, tiled, tmp_path / "rows")
    order = re.search(r"read order: ([^\n]*)", log).group(1)
    assert re.match(r"\d+ block\(s\) of \d+ latitude rows \(", order) and "does not fit compute.memory" in order
    assert len(tile_reads) == tiles and max(tile_reads.values()) > 1  # tiles shared by blocks of rows: again
    for name, variable in rows.data_vars.items():
        if variable.dtype.kind == "f":
            scale = np.nanmax(np.abs(variable.values))
            np.testing.assert_allclose(slabs[name].values, variable.values, rtol=0, atol=1e-12 * scale, err_msg=name)

    with xr.open_dataset(trained / "out" / "modes.nc") as modes:
        pcs, maps, eigenvalues = modes["pc"].values, modes["eof"].values, modes["eigenvalue"].values
    np.testing.assert_allclose(slabs["pc"].values, pcs, rtol=0, atol=1e-9 * np.abs(pcs).max())
    field = values.astype(np.float64).reshape(STEPS // 12, 12, LAT.size, LON.size)  # years x months
    with np.errstate(invalid="ignore"), pytest.warns(RuntimeWarning, match="empty slice"):  # land: all NaN
        anomaly = np.nan_to_num((field - np.nanmean(field, axis=0)).reshape(STEPS, -1))  # missing: zero anomaly
    weights = np.repeat(np.cos(np.deg2rad(LAT)), LON.size)  # w^2, w = sqrt(cos(lat))
    reference = anomaly @ (np.nan_to_num(maps.reshape(3, -1)) * weights).T / eigenvalues
    np.testing.assert_allclose(slabs["pc"].values, reference.T, rtol=0, atol=1e-9 * np.abs(reference).max())


def _plan(budget: float, in_use: float = 2e8, workers: int = 2, local: bool = True):
    results = xr.Dataset(coords={"mode": [1, 2, 3]})
    storage = Storage((48, 5, 9), True, (25, 36), steps=144, cached=True)
    return plan_projection((144, 25, 36), results, int(budget), int(in_use), workers, [storage], 4, local)


def test_slabs_are_planned_where_they_fit_and_rows_where_not():
    """The plan's arithmetic (README, compute.memory): 70 % of the budget less what the process holds and
    the libraries' 0.1 GB; a slab of 48 x 25 x 36 float32 values held as read (2 itemsizes a value), plus
    at least one step a reader in float64 working copies (40 bytes a value), beside the modes' maps, the
    chunk caches and the products."""
    values = 25 * 36
    slab = 48 * values * SLAB_BYTES_PER_VALUE * 4
    beside = 3 * values * 3 * 8 + 144 * values * 4 + 144 * 4 * 8 + 4 * 5 * values * 8  # maps, the file's cache
    # (no more than its values), products, missing counts
    least = 2e8 + LIBRARY_WORK + (beside + slab + PROJECT_BYTES_PER_VALUE * values) / 0.7  # one reader, one step
    plan = _plan(least + 1e3)
    assert plan.chunks == {"time": 48, "lat": -1, "lon": -1} and (plan.readers, plan.piece) == (1, 1)
    assert plan.text.startswith("3 slab(s) of 48 time steps x every row, 1 at a time, worked on 1 step(s) at a time")
    assert "a slab as read, 0.3 MB, fits compute.memory 0.30 GB" in plan.text
    plan = _plan(least - 1e3)
    assert plan.chunks["time"] == -1 and plan.readers == 0 and "latitude rows" in plan.text
    assert "a slab of 48 time steps x every row, 0.3 MB as read, does not fit compute.memory 0.30 GB" in plan.text
    roomy = _plan(1e9)
    assert roomy.readers == 2 and roomy.piece == 48 and ", at a time" not in roomy.text
    whole = 2 * 48 * values * PROJECT_BYTES_PER_VALUE  # two slabs in float64: pieces of them, where they do not fit
    assert _plan(2e8 + LIBRARY_WORK + (beside + 2 * slab + whole) / 0.7 - 1e3).piece == 47
    assert _plan(least + 1e3, local=False).readers == 0  # a cluster's workers each read one: 2 do not fit


def test_one_slab_is_read_by_one_reader_with_all_the_room():
    """A field of one slab has nothing for a second reader: the plan gives the one reader the room two
    would share (its pieces grow with the budget, never shrink) and does not say "1 at a time" (common
    practice: more memory never makes a plan do less at once)."""
    results = xr.Dataset(coords={"mode": [1, 2, 3]})
    storage = Storage((144, 5, 9), True, (25, 36), steps=144, cached=True)
    pieces = []
    for budget in (3.2e8, 3.4e8, 3.6e8, 1e9):
        plan = plan_projection((144, 25, 36), results, int(budget), int(2e8), 2, [storage], 4)
        assert plan.readers == 1 and plan.text.startswith("1 slab(s) of 144 time steps x every row, worked on")
        pieces.append(plan.piece)
    assert pieces == sorted(pieces) and pieces[-1] == 144


def test_uncompressed_tiles_are_read_in_rows_saying_why():
    """Nothing to decompress: a block of rows reads its own part of each tile (HDF5 reads the part)."""
    results = xr.Dataset(coords={"mode": [1, 2, 3]})
    plain = Storage((48, 5, 9), False, (25, 36), steps=144, cached=True)
    plan = plan_projection((144, 25, 36), results, int(1e9), int(2e8), 2, [plain])
    assert plan.readers == 0 and plan.text.endswith("latitude rows (chunks of 48 x 5 x 9 (time x lat x lon): "
                                                    "a block of rows reads only its own part of the chunks)")


@pytest.mark.slow
def test_a_big_tiled_field_projects_in_slabs_within_its_memory(tmp_path):
    """A field of 0.25 GB (float32) in 2 files compressed in tiles of 60 x 20 x 90 against compute.memory of
    600MB: a slab of 60 steps in float64 (0.31 GB) does not fit, so the projection reads slabs as they are
    and works on a few steps at a time, and the peak resident memory of the process stays within the
    budget (getrusage of a child, which counts what the operating system gave it), as the training run's."""
    import subprocess
    import sys

    paths = tiled_half_degree_files(tmp_path, 480, 2, (60, 20, 90))
    config = write_config(tmp_path, paths, modes={"count": 3, "method": "randomized"}, compute={"memory": "600MB"})
    other = tmp_path / "other"
    other.mkdir()
    peak = ("import resource, subprocess, sys; done = subprocess.run(sys.argv[1:]); "
            "print(done.returncode, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024)")
    climodes = [sys.executable, "-m", "climodes"]
    for command in (["run", "--quiet", str(config)],
                    ["project", "--quiet", str(tmp_path / "out"),
                     str(write_config(other, paths, compute={"memory": "600MB"}))]):
        done = subprocess.run([sys.executable, "-c", peak, *climodes, *command], capture_output=True, text=True,
                              timeout=900)
        code, used = map(int, done.stdout.split()[-2:])
        assert code == 0, done.stderr
        assert used <= 600e6, (command[0], used / 1e6)
    order = re.search(r"read order: ([^\n]*)", (other / "out" / "projection.log").read_text()).group(1)
    assert order.startswith("8 slab(s) of 60 time steps x every row"), order
    assert int(re.search(r"worked on (\d+) step", order).group(1)) < 60, order
