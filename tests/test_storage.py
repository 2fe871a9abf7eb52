"""Reading the field in the files' own storage order: the layout found from the files, the order chosen
from it, one read of the files whatever the solver's passes, and the same modes whichever order ran.

References: the ``eofs`` package (Dawson 2016, J. Open Res. Softw. 4, e14), an independent EOF
implementation, on the anomalies computed here with numpy; netCDF4-python's ``Variable.chunking()`` and
``Variable.filters()`` for the layout the files were written with.
"""

import re
import tempfile
import warnings
from pathlib import Path

import netCDF4
import numpy as np
import pytest
import xarray as xr
from eofs.standard import Eof

import climodes.pipeline
from climodes.solvers import sign_rule
from climodes.storage import MEMORY, ROWS, TIME, Reading, Storage, plan_reading, storage_of
from conftest import field_dataset, red_field, tiled_half_degree_files, write_config

LAYOUTS = {  # name: NetCDF encoding of the field
    "steps": {"zlib": True, "complevel": 4, "shuffle": True, "chunksizes": (1, 25, 36)},
    "tiles": {"zlib": True, "complevel": 4, "shuffle": True, "chunksizes": (48, 5, 9)},
    "contiguous": {"contiguous": True},
}


@pytest.fixture(scope="module")
def values():
    values = red_field((144, 25, 36), 5).astype(np.float32)
    values[:, 3:5, 4:9] = np.nan  # land
    values[::7, 10, 10] = np.nan  # a gappy point, filled
    return values


@pytest.fixture(scope="module")
def files(tmp_path_factory, values):
    """The same field in each layout, in two files of 72 months each."""
    folder = tmp_path_factory.mktemp("layouts")
    lat, lon = np.linspace(-60, 60, 25), np.arange(0, 360, 10.0)
    time = xr.date_range("1990-01-01", periods=144, freq="MS")
    out = {}
    for name, encoding in LAYOUTS.items():
        out[name] = []
        for part in range(2):
            path = folder / f"{name}{part}.nc"
            piece = slice(72 * part, 72 * (part + 1))
            field_dataset(values[piece], lat, lon, time=time[piece]).to_netcdf(path, encoding={"tas": encoding})
            out[name].append(path)
    return out


@pytest.mark.parametrize("name", list(LAYOUTS))
def test_the_layout_is_what_netcdf4_says(files, name):
    with xr.open_dataset(files[name][0]) as ds:
        storage = storage_of(ds["tas"], {"time": "time", "lat": "lat", "lon": "lon"})
    with netCDF4.Dataset(files[name][0]) as nc:  # the reference: netCDF4-python's own view of the variable
        chunking, filters = nc["tas"].chunking(), nc["tas"].filters()
    assert storage.chunks == (None if chunking == "contiguous" else tuple(chunking))
    assert storage.compressed == bool(filters["zlib"])
    assert storage.whole_maps == (name == "steps")


STEPS = Storage((1, 25, 36), True, (25, 36))
TILES = Storage((48, 5, 9), True, (25, 36))


@pytest.mark.parametrize("storages, rows, room, local, order", [
    ([STEPS], 3, 1e9, True, MEMORY),  # fits: one read into memory, whatever the layout
    ([TILES], 3, 1e9, True, MEMORY),
    ([STEPS], 3, 1e9, False, TIME),  # worker processes: no shared memory, a scratch copy
    ([STEPS], 3, 0, True, TIME),  # too big for memory
    ([STEPS, TILES], 3, 0, True, ROWS),  # one file in tiles: rows for all (common practice)
    ([TILES], 3, 0, True, ROWS),
    ([Storage(None, False, (25, 36))], 3, 0, True, ROWS),
    ([STEPS], 25, 0, True, ROWS),  # one row block reads each chunk once a pass already
])
def test_the_order_follows_the_layout(storages, rows, room, local, order):
    reading = plan_reading(storages, (144, 25, 36), 4, rows, room, local)
    assert reading.order == order
    if order == TIME:
        assert reading.readers == 0  # as many as the scheduler's workers: a block holds no more than a row block
    if order != ROWS:  # blocks of whole chunks along time, holding no more values than a block of rows
        assert reading.time_steps % max(s.chunks[0] for s in storages) == 0
        assert reading.time_steps * 25 <= max(144 * 3, max(s.chunks[0] for s in storages) * 25)


SLAB = 48 * 25 * 36 * 4 * 2  # a slab of TILES: every tile of 48 steps, float32, 2 itemsizes a value


@pytest.mark.parametrize("read_room, local, workers, order, readers", [
    (0, True, 2, ROWS, 0),  # no room for a slab: rows, each chunk decompressed by every block crossing it
    (SLAB, True, 2, TIME, 1),  # one slab at a time fits: read one by one, in the files' order
    (3 * SLAB, True, 2, TIME, 2),  # both workers read one
    (SLAB, False, 2, ROWS, 0),  # worker processes read one each: both must fit
    (2 * SLAB, False, 2, TIME, 2),
])
def test_tiles_are_read_once_in_slabs_where_they_fit(read_room, local, workers, order, readers):
    """Tiles of 5 rows, blocks of 3: in rows every chunk would be decompressed by two blocks each pass, so
    where a slab of whole chunks along time fits what the read may hold, the files are read once in
    slabs, as many at once as fit (arithmetic of the chunk grid, common practice)."""
    reading = plan_reading([TILES], (144, 25, 36), 4, 3, 0, local, read_room=read_room, workers=workers)
    assert (reading.order, reading.readers) == (order, readers)
    if order == TIME:
        assert reading.time_steps == 48 and "tiles of more rows than a block" in reading.reason
    uncompressed = Storage((48, 5, 9), False, (25, 36))  # read in part without decompressing: rows
    assert plan_reading([uncompressed], (144, 25, 36), 4, 3, 0, local, read_room=9 * SLAB, workers=2).order == ROWS


def test_blocks_of_rows_keep_the_bands_of_chunks_they_cross(files):
    """The chunk cache a file needs in rows order: the bands of chunks (all of a file's chunks holding some
    latitude row) that the blocks in flight cross, found from the layout netCDF4 reports (chunks of 48 x 5 x
    9 on 72 steps x 25 x 36: a band is 2 chunks along time x 4 along longitude); arithmetic of the chunk
    grid, common practice."""
    from climodes.storage import cache_held, row_cache

    with xr.open_dataset(files["tiles"][0]) as ds:
        tiles = storage_of(ds["tas"], {"time": "time", "lat": "lat", "lon": "lon"})
    band = 2 * 4 * 48 * 5 * 9 * 4
    assert tiles.cached and tiles.steps == 72 and tiles.band_bytes(4) == band
    assert row_cache([tiles], 3, 25, 1, 4) == 2 * band  # 3 rows cross at most 2 bands of 5
    assert row_cache([tiles], 3, 25, 2, 4) == 2 * band  # 6 rows in flight: 2 bands at most
    assert row_cache([tiles], 4, 25, 2, 4) == 3 * band  # 8 rows: 3
    assert row_cache([tiles], 20, 25, 2, 4) == 5 * band  # the file has 5 bands
    assert row_cache([tiles], 25, 25, 2, 4) == 0  # one block holds every row: nothing shared
    for other, size in (("steps", 72 * 25 * 36 * 4), ("contiguous", 0)):  # whole maps: each block meets every
        with xr.open_dataset(files[other][0]) as ds:  # chunk of the file; contiguous: nothing to decompress
            assert row_cache([storage_of(ds["tas"], {"time": "time", "lat": "lat", "lon": "lon"})], 3, 25, 2, 4) == size
    assert row_cache([Storage((48, 5, 9), True, (25, 36), 72, cached=False)], 3, 25, 2, 4) == 0  # Zarr: no cache
    assert cache_held([tiles, tiles, Storage(None, False, (25, 36), 72, True)], 10) == 20


@pytest.mark.parametrize("room", [True, False])
def test_rows_read_tiles_through_the_planned_chunk_cache(tmp_path, cli, monkeypatch, files, room):
    """In rows order the tiled files are read with the chunk cache the plan made room for (netCDF4's own
    get_chunk_cache while the solver runs), and the log says so; with no room for it in the plan, a small
    one (4 MiB), and the log says the blocks decompress the chunks they share again.  The library's setting
    is back after the run."""
    from climodes.storage import READ_CACHE, row_cache

    if room:  # these small files' bands fit in the small cache already
        monkeypatch.setattr(climodes.pipeline, "READ_CACHE", 2**10)
    else:  # a band cache of a petabyte a file: no room for it
        monkeypatch.setattr(climodes.pipeline, "row_cache", lambda *args: int(1e15))
        monkeypatch.setattr(climodes.pipeline, "cache_held", lambda storages, size, itemsize=4: size * len(storages))
    seen, real = [], climodes.pipeline.solve

    def solve(*args, **kwargs):
        seen.append(netCDF4.get_chunk_cache()[0])
        return real(*args, **kwargs)

    monkeypatch.setattr(climodes.pipeline, "solve", solve)
    before = netCDF4.get_chunk_cache()
    _, log = _run(tmp_path, cli, monkeypatch, files["tiles"], "randomized", ROWS, f"tiles{room}")
    assert netCDF4.get_chunk_cache() == before
    if not room:
        assert seen == [READ_CACHE] and "no room in compute.memory to keep the chunks that blocks share" in log
        return
    rows = int(re.search(r"block\(s\) of (\d+) latitude rows", log).group(1))
    workers = int(re.search(r"threads: (\d+) worker thread", log).group(1))
    with xr.open_dataset(files["tiles"][0]) as ds:
        tiles = storage_of(ds["tas"], {"time": "time", "lat": "lat", "lon": "lon"})
    size = row_cache([tiles, tiles], rows, 25, workers, 4)
    assert rows < 25 and seen == [size] and f"each file keeps {size / 1e6:.1f} MB of decompressed chunks" in log


def _run(tmp_path, cli, monkeypatch, paths, method, order, name, prepare=None):
    """``climodes run`` of ``paths`` with the reading order forced to ``order``."""
    real = plan_reading

    def forced(storages, shape, itemsize, rows, room, local, **_):
        if order == MEMORY:
            return real(storages, shape, itemsize, rows, 1e12, True)
        if order == ROWS:  # today's blocks of rows, whatever the layout
            return Reading(ROWS, "as a test asks")
        reading = real(storages, shape, itemsize, rows, 0, local, read_room=1e12, workers=2)
        assert reading.order == order, reading
        return reading

    monkeypatch.setattr(climodes.pipeline, "plan_reading", forced)
    folder = tmp_path / f"{name}-{method}-{order}"
    folder.mkdir()
    config = write_config(folder, paths, modes={"count": 3, "method": method},
                          prepare=prepare or {"detrend": "linear", "max_missing": 0.2})
    code, _, err = cli("run", config)
    assert code == 0, err
    assert sorted(p.name for p in folder.iterdir()) == ["out", "run.yaml"]  # no scratch left beside
    assert not any(p.name.startswith(".field") for p in (folder / "out").iterdir())
    log = (folder / "out" / "run.log").read_text()
    return xr.open_dataset(folder / "out" / "modes.nc"), log


def _same(a: xr.Dataset, b: xr.Dataset, tolerance: float) -> None:
    for name in ("eigenvalue", "variance_explained", "eof", "pc", "fitted_climatology", "fitted_trend_slope",
                 "fitted_trend_intercept"):
        if name not in b:  # no trend removed
            continue
        scale = np.nanmax(np.abs(b[name].values))
        np.testing.assert_allclose(a[name].values, b[name].values, rtol=0, atol=tolerance * scale, err_msg=name)


@pytest.mark.parametrize("method", ["gram", "randomized"])
def test_every_order_gives_the_same_modes(tmp_path, cli, monkeypatch, values_read, files, method):
    """Rows, time (scratch copy) and memory give the same run to 1e-8; time and memory read the files once,
    rows once a pass."""
    runs = {}
    for name, order in [("steps", ROWS), ("steps", TIME), ("steps", MEMORY), ("tiles", ROWS), ("tiles", TIME)]:
        values_read["values"] = 0
        runs[name, order], log = _run(tmp_path, cli, monkeypatch, files[name], method, order, name)
        reads = values_read["values"] / (144 * 25 * 36)
        assert ("read order: blocks of latitude rows" in log) == (order == ROWS)
        if order == ROWS:
            assert reads >= 2  # a pass each
        else:
            assert reads == 1
            assert "the files read once" in log and ("in memory" in log) == (order == MEMORY)
    reference = runs["steps", ROWS]
    for key, ds in runs.items():
        _same(ds, reference, 1e-8)


def test_the_order_does_not_change_the_reference_modes(tmp_path, cli, monkeypatch, files, values):
    """The time-ordered Gram run against eofs on the anomalies made here with numpy (monthly climatology,
    then the missing values set to zero anomaly, as README's missing-data rule says)."""
    ds, _ = _run(tmp_path, cli, monkeypatch, files["steps"], "gram", TIME, "steps", {"max_missing": 0.2})
    field = values.astype(np.float64).reshape(12, 12, 25, 36)  # years x months
    with np.errstate(invalid="ignore"), pytest.warns(RuntimeWarning, match="empty slice"):  # land: all NaN
        anomaly = (field - np.nanmean(field, axis=0)).reshape(144, 25, 36)
    anomaly = np.where(np.isnan(anomaly) & ~np.isnan(values).all(axis=0), 0.0, anomaly)
    anomaly -= anomaly.mean(axis=0)
    lat = ds["lat"].values
    weights = np.broadcast_to(np.sqrt(np.cos(np.deg2rad(lat)))[:, None], (25, 36))
    ref = Eof(anomaly, weights=weights, center=False, ddof=1)
    np.testing.assert_allclose(ds["variance_explained"].values, ref.varianceFraction(3), atol=1e-6)
    maps = ref.eofsAsCovariance(neofs=3, pcscaling=1).reshape(3, -1)
    valid = np.isfinite(maps[0])
    lat2d, lon2d = np.meshgrid(lat, ds["lon"].values, indexing="ij")
    signs = sign_rule(maps.T[valid], lat2d.reshape(-1)[valid], lon2d.reshape(-1)[valid])
    scale = np.abs(maps[:, valid]).max()
    np.testing.assert_allclose(ds["eof"].values.reshape(3, -1)[:, valid], signs[:, None] * maps[:, valid],
                               atol=1e-6 * scale)


# --- Zarr stores as input


def test_a_zarr_store_gives_the_modes_of_the_netcdf_files(tmp_path, cli, files):
    """The same field as a Zarr store with its own chunks (whole maps of 12 steps, compressed): the same run
    to 1e-8 as the NetCDF files, its layout found from the store, its size in the provenance."""
    store = tmp_path / "field.zarr"
    with xr.open_mfdataset(files["steps"]) as ds, warnings.catch_warnings():
        warnings.simplefilter("ignore")  # zarr's note on consolidated metadata, for whoever writes the store
        ds.chunk({"time": 12}).to_zarr(store, mode="w")
    runs = {}
    for name, paths, counted in (("netcdf", files["steps"], f"{len(files['steps'])} file(s)"),
                                 ("zarr", [store], "1 Zarr store(s)")):
        folder = tmp_path / name
        folder.mkdir()
        config = write_config(folder, paths, modes={"count": 3, "method": "gram"}, prepare={"max_missing": 0.2})
        code, out, err = cli("run", config)
        assert code == 0 and "Warning" not in err, err
        assert f"of tas from {counted}, " in out + err  # a store of many files is one input (Zarr's own model)
        runs[name] = xr.open_dataset(folder / "out" / "modes.nc")
    _same(runs["zarr"], runs["netcdf"], 1e-8)
    assert "field.zarr" in runs["zarr"].attrs["climodes_input_files"]
    with xr.open_dataset(store, engine="zarr") as ds:
        storage = storage_of(ds["tas"], {"time": "time", "lat": "lat", "lon": "lon"})
    assert storage.chunks == (12, 25, 36) and storage.compressed and storage.whole_maps
    assert "not stored" not in err
    chunk = sorted(p for p in (store / "tas").rglob("*") if p.is_file() and not p.name.startswith(("zarr", ".z")))
    chunk[len(chunk) // 2].unlink()  # a store copied in part: zarr reads the chunk as its fill value
    code, _, err = cli("run", "--overwrite", tmp_path / "zarr" / "run.yaml")
    assert code == 0 and f"{store}: 1 of the 12 chunks of tas are not stored" in err


def test_a_broken_zarr_store_is_one_line(tmp_path, cli):
    """A folder named .zarr without Zarr metadata: exit 2, one line naming it (README: bad input)."""
    store = tmp_path / "broken.zarr"
    store.mkdir()
    (store / "junk.txt").write_text("not zarr")
    config = write_config(tmp_path, [store])
    code, out, err = cli("run", config)
    assert code == 2 and err.count("\n") == 1 and "broken.zarr: cannot be read as a Zarr store" in err
    assert sorted(p.name for p in store.iterdir()) == ["junk.txt"]  # the input is not changed


def test_the_scratch_copy_gives_back_what_was_stored(tmp_path):
    """Time blocks in, any block of rows (and any slice) out: the same values as the numpy array (the
    reference), the blocks of rows stored one after another."""
    from climodes.storage import ScratchArray

    field = np.random.default_rng(2).standard_normal((50, 11, 7)).astype(np.float32)
    scratch = ScratchArray(tmp_path / "copy", field.shape, field.dtype, rows=3)
    for start in range(0, 50, 12):
        scratch[start:start + 12] = field[start:start + 12]
    assert (tmp_path / "copy").stat().st_size == field.nbytes
    for key in [(slice(None), slice(3, 6), slice(None)), (slice(None), slice(9, 11), slice(None)),
                (slice(5, 17), slice(2, 10), slice(1, 4)), (slice(0, 0), slice(0, 0), slice(0, 0))]:
        np.testing.assert_array_equal(scratch[key], field[key])


def test_the_copy_is_read_with_a_small_chunk_cache_and_the_files_closed_after(tmp_path, files):
    """While the files are read once, netCDF4 (its own get_chunk_cache) reports the small cache; after, the
    library's setting is back, the files are closed, and the copy holds the values the files hold."""
    import contextlib

    from climodes.config import InputSection
    from climodes.fields import open_field, rechunked
    from climodes.storage import READ_CACHE, staged

    before = netCDF4.get_chunk_cache()
    opened = open_field(InputSection(paths=[str(p) for p in files["steps"]], variable="tas"))
    field = rechunked(opened, {"time": 12, "lat": -1, "lon": -1}).data
    seen = []

    @contextlib.contextmanager
    def progress(label):
        seen.append(netCDF4.get_chunk_cache()[0])
        yield

    closed = []
    with staged(field, Reading(TIME, "as a test asks", 12), 5, tmp_path, progress,
                lambda: closed.append(opened.close_files())) as copy:
        assert seen == [READ_CACHE] and len(closed) == 2
        assert netCDF4.get_chunk_cache() == before
        assert copy.chunks[1] == (5,) * 5
        np.testing.assert_array_equal(copy.values, field.values)
    assert list(tmp_path.iterdir()) == []  # the scratch file is gone


def test_a_file_stored_time_last_is_cut_before_it_is_turned(tmp_path):
    """A file stored (lon, lat, time), as some archives are: a block of 30 steps reads only its own
    values (netCDF4's hyperslab), as from a file stored time first.  Turned to (time, lat, lon) before it was
    cut, xarray's lazily transposed array read far more for each block (measured: 25 times a block's
    memory, over compute.memory).  Python's tracemalloc sees numpy's allocations (numpy's documentation)."""
    import tracemalloc

    from climodes.config import InputSection
    from climodes.fields import open_field, rechunked

    lat, lon = np.linspace(-59, 59, 60), np.arange(0, 360, 3.0)
    values = np.random.default_rng(2).normal(size=(365, 60, 120)).astype(np.float32)
    stored = field_dataset(values, lat, lon, time=xr.date_range("2001-01-01", periods=365, freq="D"))
    stored = stored.transpose("lon", "lat", "time")
    stored.to_netcdf(tmp_path / "late.nc", encoding={"tas": {"zlib": True, "chunksizes": (30, 15, 365)}})
    opened = open_field(InputSection(paths=[str(tmp_path / "late.nc")], variable="tas"))
    field = rechunked(opened, {"time": 30, "lat": -1, "lon": -1}).data
    assert field.dims == ("time", "lat", "lon")
    tracemalloc.start()
    try:
        first = field.data.blocks[0].compute(scheduler="synchronous")
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
        opened.close_files()
    np.testing.assert_array_equal(first, values[:30])
    assert peak < 4 * first.nbytes < values.nbytes


def test_the_copy_in_memory_is_the_only_copy(tmp_path, files):
    """Read into memory (the order for a field that fits compute.memory), the field is held once: the plan
    counts it once, and dask.array.from_array would copy an array it is given whole (it copies whatever has
    a ``copy`` method).  Python's tracemalloc sees numpy's allocations (numpy's documentation)."""
    import contextlib
    import tracemalloc

    from climodes.config import InputSection
    from climodes.fields import open_field, rechunked
    from climodes.storage import MEMORY, staged

    opened = open_field(InputSection(paths=[str(p) for p in files["steps"]], variable="tas"))
    field = rechunked(opened, {"time": 12, "lat": -1, "lon": -1}).data
    tracemalloc.start()
    try:
        with staged(field, Reading(MEMORY, "as a test asks", 12), 5, tmp_path, lambda label: contextlib.nullcontext(),
                    opened.close_files) as copy:
            held, _ = tracemalloc.get_traced_memory()
            first = copy.data.blocks[0, 0, 0].compute(scheduler="synchronous")
    finally:
        tracemalloc.stop()
    assert field.nbytes <= held < 1.5 * field.nbytes
    np.testing.assert_array_equal(first, field.values[:, :5])


def test_a_run_that_writes_nothing_copies_into_a_temporary_folder(tmp_path, cli, monkeypatch, files):
    """``climodes.run(config)`` without ``write`` has no staging folder: the scratch copy of the time order
    goes to a temporary folder, removed at the end, and the modes are those of the written run."""
    written, _ = _run(tmp_path, cli, monkeypatch, files["steps"], "randomized", TIME, "steps")
    made = []
    real = tempfile.TemporaryDirectory

    def watched(*args, **kwargs):
        folder = real(*args, **kwargs)
        made.append(Path(folder.name))
        return folder

    monkeypatch.setattr(tempfile, "TemporaryDirectory", watched)
    config = tmp_path / "steps-randomized-time" / "run.yaml"
    in_memory = climodes.run(config)
    assert made and not any(folder.exists() for folder in made)
    assert not (tmp_path / "steps-randomized-time" / "out" / ".field-scratch").exists()
    _same(in_memory, written, 1e-8)


def test_batch_workers_get_no_scratch_copy_in_a_local_temporary_folder(tmp_path):
    """A run that writes nothing has no results folder that every worker can see: on batch workers (which
    may run on other machines) no scratch copy is made, since a worker would read its own machine's empty
    temporary folder; on this machine one goes to a temporary folder removed at the end."""
    from dataclasses import replace

    from climodes.config import ComputeSection

    local = ComputeSection()
    with climodes.pipeline._scratch_folder(None, local) as folder:
        assert Path(folder).is_dir()
    assert not Path(folder).exists()
    with climodes.pipeline._scratch_folder(None, replace(local, scheduler="slurm")) as folder:
        assert folder is None
    with climodes.pipeline._scratch_folder(tmp_path, replace(local, scheduler="slurm")) as folder:
        assert folder == tmp_path  # the staging folder of the results, beside output.dir


def test_a_damaged_compressed_file_is_one_line_naming_it(tmp_path, cli, values):
    """A file whose compressed chunks were overwritten (a copy cut short, a bad disk) passes every check of
    its metadata; reading its values fails inside the HDF5 library, which must come out as one line naming
    that file among those the glob matches, and exit 2, with no results folder left (common practice: the
    same as any other bad input)."""
    lat, lon = np.linspace(-60, 60, 25), np.arange(0, 360, 10.0)
    time = xr.date_range("1990-01-01", periods=144, freq="MS")
    noisy = np.random.default_rng(1).normal(size=values.shape).astype(np.float32)
    whole = field_dataset(noisy, lat, lon, time=time)
    for part, steps in (("a", slice(0, 72)), ("b", slice(72, 144))):
        whole.isel(time=steps).to_netcdf(tmp_path / f"part_{part}.nc", encoding={"tas": LAYOUTS["steps"]})
    damaged = tmp_path / "part_b.nc"
    raw = bytearray(damaged.read_bytes())
    middle = len(raw) // 2
    raw[middle:middle + len(raw) // 10] = bytes(len(raw) // 10)
    damaged.write_bytes(bytes(raw))
    config = write_config(tmp_path, [tmp_path / "part_*.nc"], modes={"count": 2, "method": "randomized"},
                          compute={"memory": "1GB"})
    code, out, err = cli("run", config)
    assert code == 2 and out == "", err
    assert len(err.strip().splitlines()) == 1 and "cannot be decoded" in err, err
    assert f"error: {damaged}: a chunk of tas" in err and "part_a" not in err and "time positions" in err, err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["part_a.nc", "part_b.nc", "run.yaml"]



def test_the_damaged_file_is_named_while_other_blocks_are_still_reading(tmp_path):
    """The failing block's neighbours are still inside the HDF5 library (threads) when the damaged file is
    looked for; the library is not thread-safe (HDF5's documentation: thread-safety only in a build made
    for it), so the search must wait its turn: without that, runs crashed (SIGSEGV) or named an intact
    file.  Four files of tiles and per-step chunks, the third damaged, read by 2 threads, run 3 times in
    their own processes (a crash must not take the suite with it)."""
    import subprocess
    import sys

    lat, lon = np.linspace(-59, 59, 60), np.arange(0, 360, 3.0)
    time = xr.date_range("2000-01-01", periods=728, freq="D")
    noisy = np.random.default_rng(5).normal(size=(728, 60, 120)).astype(np.float32)
    whole = field_dataset(noisy, lat, lon, time=time)
    chunks = [(91, 15, 30), (1, 60, 120), (30, 12, 24), (182, 15, 30)]
    for k, chunk in enumerate(chunks):
        whole.isel(time=slice(182 * k, 182 * (k + 1))).to_netcdf(
            tmp_path / f"part_{k}.nc", encoding={"tas": {"zlib": True, "chunksizes": chunk}})
    damaged = tmp_path / "part_2.nc"
    raw = bytearray(damaged.read_bytes())
    raw[len(raw) // 2:len(raw) // 2 + 3000] = bytes(3000)
    damaged.write_bytes(bytes(raw))
    config = write_config(tmp_path, [tmp_path / "part_*.nc"], modes={"count": 4, "method": "gram"},
                          compute={"memory": "1GB", "workers": 2})
    for _ in range(3):
        run = subprocess.run([sys.executable, "-m", "climodes", "run", str(config)], capture_output=True, text=True,
                             timeout=300)
        assert run.returncode == 2, run.stderr
        assert f"error: {damaged}: a chunk of tas cannot be decoded" in run.stderr, run.stderr
        assert sorted(p.name for p in tmp_path.iterdir()) == [f"part_{k}.nc" for k in range(4)] + ["run.yaml"]

# --- projections read in the files' own order


def test_a_projection_reads_each_value_once_in_the_files_order(tmp_path, cli, values_read, files):
    """A projection takes each step on its own (PC_k(t) = sum_x w_x^2 a(t, x) eof_k(x)), so files storing
    whole maps together (per-step chunks, contiguous) are read in blocks of whole maps along time, compressed
    tiles in slabs of whole chunks along time: each value read once either way, and the same projection to
    rounding.  Projecting
    the training field onto its own modes gives back the run's PCs (an identity of the EOF expansion,
    common practice), whichever order read it."""
    trained = tmp_path / "trained"
    trained.mkdir()
    config = write_config(trained, files["steps"], modes={"count": 3, "method": "gram"}, prepare={"max_missing": 0.2})
    assert cli("run", config)[0] == 0
    projections = {}
    for name in LAYOUTS:
        folder = tmp_path / name
        folder.mkdir()
        config = write_config(folder, files[name], prepare={"max_missing": 0.2})
        values_read["values"] = 0
        code, _, err = cli("project", trained / "out", config)
        assert code == 0, err
        assert values_read["values"] == 144 * 25 * 36  # each value once
        log = (folder / "out" / "projection.log").read_text()
        in_time = "time steps, whole maps in the files' own order" in log
        assert in_time == (name != "tiles") and ("slab(s) of 48 time steps" in log) == (name == "tiles")
        assert "latitude rows" not in log
        with xr.open_dataset(folder / "out" / "projection.nc") as ds:
            projections[name] = ds.load()
    with xr.open_dataset(trained / "out" / "modes.nc") as modes:
        pcs = modes["pc"].values
    for name, ds in projections.items():
        np.testing.assert_allclose(ds["pc"].values, pcs, rtol=0, atol=1e-9 * np.abs(pcs).max(), err_msg=name)
        _same_projection(ds, projections["tiles"])


def _same_projection(a: xr.Dataset, b: xr.Dataset) -> None:
    for name, variable in b.data_vars.items():
        if variable.dtype.kind == "f":
            scale = max(np.nanmax(np.abs(variable.values)), 1e-300)
            np.testing.assert_allclose(a[name].values, variable.values, rtol=0, atol=1e-12 * scale, err_msg=name)


def test_a_projection_reads_with_a_small_chunk_cache_counted_in_its_plan(tmp_path, cli, monkeypatch, files):
    """The files a projection reads keep a small chunk cache each (netCDF4's get_chunk_cache while the
    blocks are read), which its plan counts, not the library's 64 MiB a file."""
    import netCDF4

    import climodes.reuse
    from climodes.errors import UserError
    from climodes.reuse import plan_projection
    from climodes.storage import READ_CACHE

    trained = tmp_path / "trained"
    trained.mkdir()
    assert cli("run", write_config(trained, files["steps"], modes={"count": 3}, prepare={"max_missing": 0.2}))[0] == 0
    seen = []
    for name in ("project_steps", "project_block"):

        def spy(*args, real=getattr(climodes.reuse, name)):
            seen.append(netCDF4.get_chunk_cache()[0])
            return real(*args)

        monkeypatch.setattr(climodes.reuse, name, spy)
    for layout in ("steps", "tiles"):
        folder = tmp_path / layout
        folder.mkdir()
        code, _, err = cli("project", trained / "out", write_config(folder, files[layout], prepare={"max_missing": 0.2}))
        assert code == 0, err
    assert seen and set(seen) == {READ_CACHE}
    assert netCDF4.get_chunk_cache()[0] != READ_CACHE  # the library's setting is back after
    results, need = xr.Dataset(coords={"mode": [1, 2, 3]}), []
    for storages in ([], [Storage((1, 25, 36), True, (25, 36), steps=2000, cached=True)] * 40):  # files > 4 MiB
        with pytest.raises(UserError) as refused:
            plan_projection((144, 25, 36), results, int(2e8), int(2e8), 2, storages)
        need.append(refused)
    need = [float(re.search(r"give at least ([\d.]+) GB", str(e.value)).group(1)) for e in need]
    assert need[1] - need[0] >= 40 * READ_CACHE / 0.7 / 1e9 - 0.01  # 40 files' caches in the advice


@pytest.mark.parametrize("storage, order", [
    (Storage((24, 25, 36), True, (25, 36)), {"time": 24, "lat": -1, "lon": -1}),  # a whole chunk, not a part
    (Storage((1, 25, 36), True, (25, 36)), None),  # several steps a block, a whole number of chunks
    (Storage(None, False, (25, 36)), None),  # contiguous: maps stored one after the other
    (Storage((48, 5, 9), True, (25, 36)), {"time": 48, "lat": -1, "lon": -1}),  # compressed tiles: slabs
    (Storage((48, 5, 9), False, (25, 36)), {"time": -1, "lon": -1}),  # uncompressed tiles: rows
])
def test_a_projection_plans_blocks_of_whole_chunks_along_time(storage, order):
    """Blocks of whole maps hold whole chunks of the files along time, even where keeping 4 blocks a
    worker would cut a chunk (each chunk is then decompressed once, not once per part); compressed tiles go
    by slabs of whole chunks along time, uncompressed ones by rows."""
    from climodes.reuse import plan_projection

    results = xr.Dataset(coords={"mode": [1, 2, 3]})
    plan = plan_projection((144, 25, 36), results, int(1e9), int(2e8), 2, [storage])
    chunks, text = plan.chunks, plan.text
    assert plan.readers == (0 if chunks["time"] == -1 else 2)
    if order is None:
        assert chunks["time"] % (storage.chunks[0] if storage.chunks else 1) == 0 and 0 < chunks["time"] < 144
        assert text.endswith("whole maps in the files' own order")
    elif order["time"] == -1:
        assert chunks["time"] == -1 and 0 < chunks["lat"] < 25 and "latitude rows (" in text
        assert "a block of rows reads only its own part of the chunks" in text
    else:
        assert chunks == order


@pytest.mark.slow
def test_a_tiled_compressed_field_is_read_in_rows_within_its_memory(tmp_path):
    """A field of 0.52 GB (float32) in 4 compressed files of chunks 125 x 4 x 90 against compute.memory of
    500MB: read in blocks of rows with the files' chunk caches planned beside them (or once, in slabs of
    whole tiles, where a block holds fewer rows than a tile), and the peak resident
    memory of the run stays within it (getrusage of a child, which counts what the operating system gave
    it; the library's default cache, 64 MiB a file, would take 0.27 GB beside the plan)."""
    import subprocess
    import sys

    paths = tiled_half_degree_files(tmp_path, 1000, 4, (125, 4, 90))
    config = write_config(tmp_path, paths, modes={"count": 3, "method": "randomized"}, compute={"memory": "500MB"})
    peak = ("import resource, subprocess, sys; done = subprocess.run(sys.argv[1:]); "
            "print(done.returncode, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024)")
    done = subprocess.run([sys.executable, "-c", peak, sys.executable, "-m", "climodes", "run", "--quiet", str(config)],
                          capture_output=True, text=True, timeout=900)
    code, used = map(int, done.stdout.split()[-2:])
    assert code == 0, done.stderr
    log = (tmp_path / "out" / "run.log").read_text()
    in_rows = "read order: blocks of latitude rows" in log and "MB of decompressed chunks" in log
    assert in_rows or "compressed in tiles of more rows than a block" in log  # rows with the cache, or slabs
    assert used <= 500e6, used / 1e6


def test_many_small_files_plan_no_more_cache_than_they_hold(tmp_path, cli, fresh_process):
    """One map a file is the usual archive layout: each file's chunk cache holds at most its own values, and
    only the files xarray keeps open at once (its file_cache_maxsize) hold any, so 300 one-step files of a
    tiny grid are planned like one file, not 300 x 4 MiB (which asked for 1.8 GB for a 0.2 MB field)."""
    from climodes.storage import READ_CACHE, cache_held

    lat, lon = np.linspace(-40, 40, 10), np.arange(0, 200, 10.0)
    time = xr.date_range("2000-01-01", periods=300, freq="D")
    values = red_field((300, 10, 20), 3).astype(np.float32)
    paths = []
    for step in range(300):
        paths.append(tmp_path / f"day{step:03d}.nc")
        field_dataset(values[step:step + 1], lat, lon, time=time[step:step + 1]).to_netcdf(
            paths[-1], encoding={"tas": {"zlib": True, "chunksizes": (1, 10, 20)}})
    config = write_config(tmp_path, paths, modes={"count": 3}, compute={"memory": "600MB"})
    code, out, err = cli("check", config)
    assert code == 0, err
    day = Storage((1, 10, 20), True, (10, 20), steps=1, cached=True)
    assert cache_held([day] * 300, READ_CACHE) == 128 * 10 * 20 * 4  # a map each, 128 files open at once
    month = Storage((1, 180, 360), True, (180, 360), steps=31, cached=True)
    assert cache_held([month] * 500, READ_CACHE) == 128 * READ_CACHE  # xarray's default: 128 files open at once


def test_a_chunk_longer_than_its_file_counts_as_the_file():
    """NetCDF lets a chunk be longer than a file's (unlimited) time axis: a 30-step file chunked 1024 x lat x
    lon holds 30 steps a chunk, and must not make every file's blocks 1024 steps long, nor send a projection
    of per-step files back to rows."""
    from climodes.reuse import plan_projection

    short = Storage((1024, 25, 36), True, (25, 36), steps=30, cached=True)
    daily = Storage((1, 25, 36), True, (25, 36), steps=57, cached=True)
    assert short.time_chunk == 30 and daily.time_chunk == 1 and Storage(None, False, (25, 36)).time_chunk == 1
    reading = plan_reading([daily, short, daily], (144, 25, 36), 4, 3, 0, True)
    assert reading.order == TIME and reading.time_steps % 30 == 0 and reading.time_steps < 144
    plan = plan_projection((144, 25, 36), xr.Dataset(coords={"mode": [1, 2]}), int(1e9), int(2e8), 2,
                           [daily, short, daily])
    assert plan.chunks["lat"] == -1 and plan.text.endswith("whole maps in the files' own order")


def test_a_projection_reads_one_chunk_at_a_time_rather_than_in_rows():
    """Where a whole chunk of the files along time fits the budget for one block but not for each worker's,
    the projection reads blocks of whole maps one at a time: in rows, every block would decompress every
    chunk again (arithmetic of the plan: 40 bytes a value of a block, 0.1 GB kept for the libraries)."""
    from climodes.reuse import plan_projection
    from climodes.solvers import LIBRARY_WORK

    chunked = Storage((24, 25, 36), True, (25, 36), steps=72, cached=True)
    results = xr.Dataset(coords={"mode": [1, 2, 3]})
    budget = int(2e8 + LIBRARY_WORK + 2.1e6)
    plan = plan_projection((144, 25, 36), results, budget, int(2e8), 2, [chunked])
    assert (plan.chunks["time"], plan.readers, plan.piece) == (24, 1, 0)
    assert plan.text.endswith("whole maps in the files' own order, 1 at a time")
    plan = plan_projection((144, 25, 36), results, budget + int(2e6), int(2e8), 2, [chunked])
    assert plan.chunks["time"] % 24 == 0 and plan.readers == 2
