"""How the input files store the field, and the order a run reads it in.

A streaming solver passes over the field in blocks of latitude rows with every time step.  Files
whose chunks hold whole maps of a few steps (model output: ``(1, lat, lon)``, zlib-compressed) have to
decompress every chunk once per block and per pass that way.  So the run reads such files once in
their own order, blocks of whole time chunks each holding whole maps, and keeps a copy in the row
blocks the passes need: in memory when it fits ``compute.memory`` (any layout: then every pass reads
memory), else in an uncompressed scratch file inside the results' staging folder, removed when the
solver is done.  Files compressed in tiles of more rows than a block go the same way, read in slabs of
whole chunks along time (every tile of some steps), where a slab fits.  Other files (smaller tiles,
uncompressed, contiguous) are read in row blocks (:data:`ROWS`): each of their chunks then holds a
piece of few blocks, and each NetCDF file keeps the
chunks the blocks in flight share in its chunk cache, sized and counted by the memory plan
(:func:`row_cache`), or, where the plan has no room for them, decompresses them again for each block.

The copy holds exactly the values read and the solvers' arithmetic is the same, so the results agree
whichever order is chosen; to rounding, not to the bit, where a selection gives the blocks of the copy
other dask chunks than those of the files (differences of about 1e-7 of the largest value, more on
modes within noise of each other, seen; the tests hold the orders to 1e-8 on whole fields).
"""

from __future__ import annotations

import contextlib
import math
import re
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, ContextManager, Iterator

import dask
import dask.array
import numpy as np
import xarray as xr

ROWS, TIME, MEMORY = "rows", "time", "memory"
READ_CACHE = 4 * 2**20  # bytes of decompressed chunks each file keeps where no chunk is shared between blocks
# (netCDF-C's default: 64 MiB)
SLAB_BYTES_PER_VALUE = 2  # itemsizes a value of a slab read in the files' order holds (measured: 1.2)
WHOLE_MAP = 0.5  # a chunk holding at least this share of a map counts as holding whole maps
# How the readers of compressed files say that the bytes they were given cannot be decoded.
_DAMAGE = re.compile(r"NetCDF: HDF error|decompress|[Cc]orrupt|checksum|[Ii]nvalid input data")
_FILTERS = ("zlib", "szip", "zstd", "bzip2", "blosc", "compressor", "compressors", "filters")


@dataclass(frozen=True)
class Storage:
    """How one file stores the field: its chunk lengths along ``(time, lat, lon)`` (``None`` when stored
    contiguously), whether a filter (compression) must run on each chunk read, the file's map size and
    steps, and whether its reader keeps a chunk cache (NetCDF; Zarr keeps none)."""

    chunks: tuple[int, int, int] | None
    compressed: bool
    grid: tuple[int, int]
    steps: int = 0  # the file's time steps
    cached: bool = False  # read through the NetCDF library, which keeps decompressed chunks in a cache per file

    @property
    def time_chunk(self) -> int:
        """The steps a chunk of the file holds (1 when stored contiguously): no more than the file has, though
        the library lets a chunk be longer than a file's time axis."""
        length = self.chunks[0] if self.chunks else 1
        return min(length, self.steps) if self.steps else length

    @property
    def whole_maps(self) -> bool:
        """Whether a chunk holds (most of) the map of each of its steps."""
        return self.chunks is not None and self.chunks[1] * self.chunks[2] >= WHOLE_MAP * self.grid[0] * self.grid[1]

    def band_bytes(self, itemsize: int) -> int:
        """Bytes of one band of chunks, decompressed: every chunk of the file holding some latitude row, all
        its steps and longitudes (what a block of rows inside the band decompresses from this file)."""
        steps, rows, lons = self.chunks
        return -(-self.steps // steps) * steps * rows * -(-self.grid[1] // lons) * lons * itemsize

    def text(self) -> str:
        if self.chunks is None:
            return "stored contiguously"
        shape = " x ".join(map(str, self.chunks))
        return f"chunks of {shape} (time x lat x lon)" + (", compressed" if self.compressed else "")


def damage(err: BaseException) -> str | None:
    """The first line of a reader's error when it says a chunk's bytes cannot be decoded, else ``None``."""
    reason = str(err).splitlines()[0] if str(err) else ""
    return reason if _DAMAGE.search(reason) else None


def first_damaged(paths: list[str], variable: str) -> tuple[str, str] | None:
    """The first NetCDF file of ``paths`` holding a chunk of ``variable`` that cannot be decoded, with where
    (the steps of its first dimension being read) and the reader's reason; ``None`` when every file reads.

    Each file is read through once, in slabs of whole chunks along its first dimension of about 64 MiB:
    meant for after a read has failed, to name the file.  The HDF5 library is not thread-safe, and the
    blocks read beside the one that failed may still be reading: each file is read holding the HDF5 lock
    that every xarray read of a NetCDF-4 file takes too (without it, two threads in the library crashed or
    gave the wrong file).  That lock alone: holding xarray's other one too, taken in another order by a
    read waiting for this one, deadlocked.
    """
    import netCDF4
    from xarray.backends.locks import HDF5_LOCK

    for path in paths:
        where = "on opening"
        try:
            with HDF5_LOCK, netCDF4.Dataset(path) as nc:
                var = nc.variables.get(variable)
                if var is None or not var.shape:
                    continue
                var.set_auto_maskandscale(False)
                chunking = var.chunking()
                length = chunking[0] if isinstance(chunking, list) else 1
                slab = max(1, 64 * 2**20 // (var.dtype.itemsize * math.prod(var.shape[1:]) * length)) * length
                for start in range(0, var.shape[0], slab):
                    where = f"{var.dimensions[0]} positions {start} to {min(start + slab, var.shape[0]) - 1} of the file"
                    var[start:start + slab]
        except (RuntimeError, OSError, ValueError) as err:
            if damage(err):
                return path, f"{where}: {damage(err)}"
    return None


def chunk_bytes(storages: list[Storage], itemsize: int) -> int:
    """The largest chunk of the files, in bytes once decompressed (0 when all are stored contiguously)."""
    return max([int(np.prod(s.chunks)) * itemsize for s in storages if s.chunks] or [0])


def storage_of(da: xr.DataArray, axes: dict[str, str]) -> Storage:
    """The storage of a variable as the file opened it (``da.encoding``, before any renaming).

    NetCDF4 gives ``chunksizes`` (``None`` for contiguous storage) and a flag per filter (``zlib``,
    ``szip``, ``zstd``, ...); Zarr gives ``chunks`` and ``compressors`` (or ``compressor``).  ``axes`` maps
    ``time``, ``lat`` and ``lon`` to the file's dimension names.
    """
    encoding = da.encoding
    sizes = encoding.get("chunksizes") or encoding.get("preferred_chunks") or encoding.get("chunks")
    if isinstance(sizes, dict):
        sizes = tuple(sizes.get(dim, da.sizes[dim]) for dim in da.dims)
    grid = (da.sizes.get(axes["lat"], 1), da.sizes.get(axes["lon"], 1))
    steps = da.sizes.get(axes["time"], 1)
    compressed = any(bool(encoding.get(name)) for name in _FILTERS)
    cached = "chunksizes" in encoding  # netCDF4's encoding (Zarr's says "chunks")
    if not sizes or encoding.get("contiguous") or len(sizes) != da.ndim:
        return Storage(None, compressed, grid, steps, cached)
    by_dim = dict(zip(da.dims, (int(s) for s in sizes)))
    chunks = tuple(by_dim.get(axes[axis], 1) for axis in ("time", "lat", "lon"))
    return Storage(chunks, compressed, grid, steps, cached)


def row_cache(storages: list[Storage], rows: int, nlat: int, workers: int, itemsize: int) -> int:
    """The chunk cache each NetCDF file needs (bytes) so that blocks of ``rows`` of the field's ``nlat``
    latitude rows, ``workers`` of them read side by side, decompress each chunk once a pass: the bands of
    chunks (:meth:`Storage.band_bytes`) that the neighbouring blocks in flight cross, wherever they start.

    0 when no compressed file of the NetCDF library holds a chunk of several rows, or one block holds
    every row: then no block shares a chunk with another.
    """
    if rows >= nlat:
        return 0
    size = 0
    for storage in storages:
        if storage.cached and storage.compressed and storage.chunks and storage.chunks[1] > 1:
            height = storage.chunks[1]
            bands = min(-(-(workers * rows - 1) // height) + 1, -(-storage.grid[0] // height))
            size = max(size, bands * storage.band_bytes(itemsize))
    return size


def cache_held(storages: list[Storage], size: int, itemsize: int = 4) -> int:
    """Bytes the chunk caches of ``storages``' files hold at most, each file keeping up to ``size`` and
    no more than its own values (``itemsize`` bytes each; a file of one daily map caches one map), and
    only the files xarray keeps open at once (``file_cache_maxsize``, 128 by default) holding any."""
    held = sorted((min(size, storage.steps * storage.grid[0] * storage.grid[1] * itemsize if storage.steps else size)
                   for storage in storages if storage.cached and storage.chunks is not None), reverse=True)
    return sum(held[:xr.get_options()["file_cache_maxsize"]])


@contextlib.contextmanager
def keeping_chunks(size: int) -> Iterator[None]:
    """NetCDF files opened meanwhile keep at most ``size`` bytes of decompressed chunks each."""
    import netCDF4

    before = netCDF4.get_chunk_cache()
    netCDF4.set_chunk_cache(size, before[1], before[2])
    try:
        yield
    finally:
        netCDF4.set_chunk_cache(*before)


@dataclass(frozen=True)
class Reading:
    """The order a run reads its field in (:data:`ROWS`, :data:`TIME` or :data:`MEMORY`), why, for the
    last two the steps a read block holds (whole chunks of the files), and the chunk cache of each file
    while the files are read (see :func:`row_cache`)."""

    order: str
    reason: str
    time_steps: int = 0
    cache: int = READ_CACHE  # bytes of decompressed chunks each NetCDF file keeps while it is read
    readers: int = 0  # blocks read at once in the files' order (0: as many as the scheduler's workers)

    def text(self, passes: str) -> str:
        """A line for the log: the order, why, and how many reads of the files ``passes`` passes cost."""
        if self.order == ROWS:
            return f"blocks of latitude rows, {passes} passes over the files ({self.reason})"
        held = "in memory" if self.order == MEMORY else "in an uncompressed scratch copy"
        return (f"the files read once, in blocks of {self.time_steps} whole time steps ({self.reason}); "
                f"the solver's {passes} passes read the field {held}")


def plan_reading(storages: list[Storage], shape: tuple[int, int, int], itemsize: int, rows: int,
                 room: float, local: bool, read_room: float = 0.0, workers: int = 1) -> Reading:
    """Choose the reading order of a field of ``shape`` stored as ``storages`` (one per file).

    ``rows`` is how many latitude rows a block of the solver's plan holds (a time block holds no more
    values, and at least one chunk of the files along time); ``room`` the bytes of
    ``compute.memory`` its plan leaves unused; ``local`` whether the solver runs in this process (threads),
    where a copy in memory is shared with the passes at no cost; ``read_room`` the bytes a read before the
    passes may hold (the plan's share of ``compute.memory``, nothing else held yet) and ``workers`` how many
    blocks are read at once.

    - :data:`MEMORY` when the field as read fits ``room`` and runs locally: one read, every pass in memory;
    - :data:`TIME` when every file's chunks hold whole maps of fewer steps than the file has and the plan
      has more than one row block: one read in the files' order, the passes over a scratch copy;
    - :data:`TIME` too when every file is compressed in tiles holding more rows than a block, and a slab of
      whole chunks along time (every tile of some steps, :data:`SLAB_BYTES_PER_VALUE`) fits ``read_room``:
      read by as many ``readers`` at once as fit (on a local scheduler; elsewhere every worker reads one);
    - :data:`ROWS` otherwise: the passes read the files in blocks of rows, each chunk once a pass.
    """
    steps, nlat, nlon = shape
    field_bytes = steps * nlat * nlon * itemsize
    chunked = [s for s in storages if s.chunks is not None]
    time_chunk = max([s.time_chunk for s in chunked] or [1])
    row_blocks = -(-nlat // rows)
    block = max(time_chunk, min(steps * rows // nlat, steps) // time_chunk * time_chunk)
    if local and field_bytes <= room:
        return Reading(MEMORY, f"the field as read, {field_bytes / 1e6:.0f} MB, fits compute.memory", block)
    layout = "; ".join(sorted({s.text() for s in storages}))
    if storages and all(s.whole_maps and s.time_chunk < steps for s in storages) and row_blocks > 1:
        return Reading(TIME, f"the files hold whole maps per chunk: {layout}", block)
    if row_blocks <= 1:
        return Reading(ROWS, "one block holds every row, so each chunk is read once a pass")
    tiles = storages and all(s.chunks is not None and s.compressed and s.chunks[1] > rows for s in storages)
    readers = int(read_room // (time_chunk * nlat * nlon * SLAB_BYTES_PER_VALUE * itemsize))
    if tiles and time_chunk < steps and readers >= (1 if local else workers):
        readers = min(readers, workers)
        return Reading(TIME, f"the files are compressed in tiles of more rows than a block: {layout}; "
                             f"{readers} slab(s) of {time_chunk} steps read at once", time_chunk, readers=readers)
    return Reading(ROWS, f"{layout}: a block of rows reads only its own chunks")


class Uncopied:
    """An in-memory array that ``dask.array.from_array`` reads pieces of without copying it whole first
    (it copies whatever has a ``copy`` method: for the field read into memory, a second field)."""

    def __init__(self, values: np.ndarray):
        self.values, self.shape, self.dtype, self.ndim = values, values.shape, values.dtype, values.ndim

    def __getitem__(self, key) -> np.ndarray:
        return self.values[key]


class ScratchArray:
    """A scratch file holding a ``(time, lat, lon)`` field as consecutive blocks of ``rows`` latitude rows,
    each ``(time, rows, lon)`` in C order, as an array dask can read blocks from and store time blocks into.

    A block of rows is then one contiguous read, and a block of time steps one contiguous write per block
    of rows; plain file reads and writes, no memory map, so the process's resident memory holds what it
    reads and no more.  The object pickles small and works in any worker process that sees the folder.
    """

    def __init__(self, path: Path, shape: tuple[int, int, int], dtype, rows: int):
        self.path, self.shape, self.dtype, self.ndim, self.rows = path, tuple(shape), np.dtype(dtype), 3, rows
        with open(path, "wb") as f:
            f.truncate(int(np.prod(shape)) * self.dtype.itemsize)

    def _blocks(self, first: int, last: int) -> Iterator[tuple[int, int, int]]:
        """The blocks of rows meeting rows ``first`` to ``last`` (excluded): each one's first and last row
        and its offset in bytes."""
        steps, nlat, nlon = self.shape
        for start in range(first // self.rows * self.rows, last, self.rows):
            yield start, min(start + self.rows, nlat), start * steps * nlon * self.dtype.itemsize

    def __getitem__(self, key) -> np.ndarray:
        key = (key if isinstance(key, tuple) else (key,)) + (slice(None),) * 3
        (t0, t1, _), (r0, r1, _), _ = (k.indices(n) for k, n in zip(key[:3], self.shape))
        steps, _, nlon = self.shape
        pieces = []
        with open(self.path, "rb") as f:
            for start, stop, offset in self._blocks(r0, r1):
                width = stop - start
                f.seek(offset + t0 * width * nlon * self.dtype.itemsize)
                count = max(t1 - t0, 0) * width * nlon
                block = np.fromfile(f, dtype=self.dtype, count=count).reshape(max(t1 - t0, 0), width, nlon)
                pieces.append(block[:, max(r0 - start, 0):min(r1, stop) - start])
        out = np.concatenate(pieces, axis=1) if pieces else np.empty((max(t1 - t0, 0), 0, nlon), self.dtype)
        return out[(slice(None), slice(None), key[2])]

    def __setitem__(self, key, values) -> None:
        """Write whole maps of some steps: ``key`` a slice of time steps."""
        t0, _, _ = (key[0] if isinstance(key, tuple) else key).indices(self.shape[0])
        nlon = self.shape[2]
        values = np.asarray(values, dtype=self.dtype)
        with open(self.path, "r+b") as f:
            for start, stop, offset in self._blocks(0, self.shape[1]):
                f.seek(offset + t0 * (stop - start) * nlon * self.dtype.itemsize)
                np.ascontiguousarray(values[:, start:stop]).tofile(f)


def _put(target, where: slice, block: np.ndarray) -> None:
    target[where] = block


@contextlib.contextmanager
def staged(field: xr.DataArray, reading: Reading, rows: int, scratch: Path | None,
           progress: Callable[[str], ContextManager], close_files: Callable[[], None]) -> Iterator[xr.DataArray]:
    """``field`` (lazy, cut in time blocks of whole chunks) read once into memory or into a scratch file
    in ``scratch`` (:class:`ScratchArray`; None only with the rows order), per ``reading``, and given back
    chunked in blocks of ``rows`` latitude rows with every time step; the scratch file is removed when the
    block ends.  ``progress`` is called around the read.

    The files are read with the chunk cache of ``reading`` (in the files' order, where each chunk is read
    once, a small one: :data:`READ_CACHE`; in rows, what the blocks that share chunks need, planned with
    the solver's memory): ``close_files`` closes them before (they open again as they are read) and after
    the reads, which frees their caches (the library's default, 64 MiB a file, would stay held for the
    whole run, and uncounted)."""
    if reading.order == ROWS:
        close_files()
        try:
            with keeping_chunks(reading.cache):
                yield field
        finally:
            close_files()
        return
    path = scratch / ".field-scratch"
    try:
        if reading.order == MEMORY:
            target = np.empty(field.shape, dtype=field.dtype)
        else:
            target = ScratchArray(path, field.shape, field.dtype, rows)
        data = field.data.rechunk({1: -1, 2: -1})
        starts = np.cumsum((0,) + data.chunks[0])
        writes = [dask.delayed(_put, pure=False)(target, slice(a, b), block)
                  for a, b, block in zip(starts[:-1], starts[1:], data.to_delayed().ravel())]
        close_files()
        with keeping_chunks(reading.cache), progress("reading the field once, in the files' own order"):
            dask.compute(*writes, **({"num_workers": reading.readers} if reading.readers else {}))
        close_files()
        held = Uncopied(target) if reading.order == MEMORY else target
        yield field.copy(data=dask.array.from_array(held, chunks=(-1, rows, -1), name=False, asarray=False))
    finally:
        path.unlink(missing_ok=True)


def scratch_room(folder: Path, nbytes: int) -> bool:
    """Whether ``folder``'s file system has room for a scratch copy of ``nbytes`` (with a 10 % margin)."""
    return shutil.disk_usage(folder).free > 1.1 * nbytes
