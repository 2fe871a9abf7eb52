"""A whole run, stage after stage: open, select, prepare, weight, solve, diagnose, write.

Each stage is a function of the previous one's result (see ``GUIDE``'s flow);
this module only calls them in order and collects what the user should hear.
:func:`check` goes through the same stages as :func:`run` up to the first
pass over the data, so what ``run`` would refuse before computing, ``check``
refuses too.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
import time
import warnings
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Callable, ContextManager, Iterator

import dask
import numpy as np
import xarray as xr
from dask.array import PerformanceWarning

from climodes.cluster import (
    SYSTEMS,
    batch_job,
    batch_script,
    batch_system,
    Capacity,
    capacity,
    check_batch_commands,
    run_memory,
    running,
    script_path,
    submit_command,
    submit_cores,
    submit_script,
    walltime,
    write_script,
)
from climodes import __version__
from climodes.config import ComputeSection, FigureOptions, RunSpec, checked_memory, figure_options
from climodes.diagnostics import correlation_maps, mode_diagnostics, residual_variables, sampling_errors
from climodes.errors import UserError
from climodes.fields import OpenedField, expand_paths, field_from_array, is_zarr, open_field, rechunked, select
from climodes.grid import GRID_LAT
from climodes.output import (
    check_geotiff_grid,
    check_output_dir,
    check_output_file,
    projection_dataset,
    results_dataset,
    results_folder,
    results_update,
    table_writer,
    write_file_atomically,
    write_geotiff,
    write_netcdf,
)
from climodes.prepare import (
    Fitted,
    TimeKeys,
    TimeSteps,
    aggregate,
    fitted_preparation,
    keys_of,
    time_bounds,
    time_steps,
)
from climodes.report import (
    REPORT_FILE,
    Picture,
    ignored_sections_note,
    inputs_count,
    modes_text,
    months_text,
    projection_headline,
    projection_plan_lines,
    projection_table,
    reconstruction_line,
    report_html,
    run_log,
    stored_config,
    table_comment,
    table_line,
    variance_table,
)
from climodes.results import PROJECTION_FILE, check_results, open_results, results_path
from climodes.reuse import (
    ProjectionOrder,
    check_points,
    check_same_grid,
    check_same_units,
    chosen_modes,
    coefficient_table,
    history,
    plan_projection,
    projected,
    projection_variables,
    reconstruction,
    reconstruction_dataset,
    time_name,
)
from climodes.rotation import rotated_variables
from climodes.significance import NoiseTest, fit_red_noise, noise_variables, red_noise_test
from climodes.solvers import POWER_ITERATIONS, Decomposition, SolverPlan, plan_solver, solve, working_precision
from climodes.storage import (
    MEMORY,
    READ_CACHE,
    ROWS,
    TIME,
    Reading,
    Storage,
    cache_held,
    chunk_bytes,
    damage,
    first_damaged,
    keeping_chunks,
    plan_reading,
    row_cache,
    scratch_room,
    staged,
)
from climodes.weights import field_weights

# warnings meant for programmers, not for someone running climodes: deprecations and dask's chunking
# advice; numpy's floating-point warnings (plain RuntimeWarning: 0/0 at points missing at every step,
# which the missing-data rule handles) are dropped too, but not their subclasses (xarray's decoding)
_NOT_FOR_USERS = (DeprecationWarning, PendingDeprecationWarning, FutureWarning, PerformanceWarning)


@dataclass
class RunSummary:
    """What a finished run tells the user."""

    output_dir: Path
    headline: str
    table: list[str]
    notes: list[str] = field(default_factory=list)
    results: xr.Dataset | None = None  # what modes.nc (or projection.nc) holds

    def text(self) -> str:
        return "\n".join([self.headline, *self.table])


@dataclass
class Planned:
    """What a run reads and how it solves it, found from the files' coordinates alone."""

    opened: OpenedField
    field: xr.DataArray
    along_time: TimeSteps
    weights: xr.DataArray
    plan: SolverPlan
    room: Capacity
    notes: list[str]
    reading: Reading


def _for_users(message: warnings.WarningMessage) -> bool:
    return not issubclass(message.category, _NOT_FOR_USERS) and message.category is not RuntimeWarning


@contextlib.contextmanager
def library_warnings(notes: list[str]) -> Iterator[None]:
    """Catch what xarray, numpy, dask and the other libraries warn about while the block runs.

    A warning that tells the user something about their data (a file's encoding, a decoding xarray
    could not do) is appended to ``notes`` as one line, once; the rest (deprecations, numpy's
    floating-point warnings, dask's chunking advice) are dropped.  None reaches stderr as a raw
    Python warning.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        yield
    for message in caught:
        text = " ".join(str(message.message).split())[:300]
        if _for_users(message) and text and text not in notes:
            notes.append(text)


def _prepared(spec: RunSpec, opened: OpenedField) -> tuple[xr.DataArray, TimeSteps, list[str]]:
    """Select the opened field and take its seasonal or annual means, lazily: only coordinates are read.

    The steps along time that follow (anomalies, trend, standardising) go to the solver to apply.
    """
    notes = list(opened.notes)
    field, steps = time_steps(select(opened, spec.select), spec.prepare, spec.select.months, notes)
    return field, steps, notes


def opened_field(spec: RunSpec, data: xr.DataArray | None = None) -> OpenedField:
    """The field of ``spec``'s input files opened lazily, or ``data`` (an in-memory field) in the same form."""
    return open_field(spec.input, spec.select) if data is None else field_from_array(data, spec.input, spec.select)


def _plan(spec: RunSpec, data: xr.DataArray | None = None) -> Planned:
    """Open (or take ``data``), select and prepare the field lazily and plan the solver: every check before
    the first pass."""
    opened = opened_field(spec, data)
    field, along_time, notes = _prepared(spec, opened)
    room = capacity(spec.compute)
    small = cache_held(opened.storages, READ_CACHE, field.dtype.itemsize)
    plan = plan_solver(field.shape, spec.modes.count, spec.modes.method, room.memory, room.workers,
                       in_use=room.in_use, fitted_per_point=along_time.values_per_point,
                       read_cache=lambda rows: small, itemsize=working_precision(field.dtype).itemsize)
    steps, points = field.sizes["time"], field.sizes["lat"] * field.sizes["lon"]
    if spec.modes.count > points:
        raise UserError(f"modes.count: {spec.modes.count} modes asked for, but the selected grid has only {points} "
                        "points; lower modes.count or widen the region")
    if steps < spec.modes.count + 1:
        raise UserError(f"modes.count: {spec.modes.count} modes need at least {spec.modes.count + 1} time steps, "
                        f"but the prepared field has {steps}; lower modes.count or lengthen select.period")
    if "geotiff" in spec.output.formats:
        check_geotiff_grid(field)
    weights = field_weights(field, spec.prepare.weighting)
    reading = plan_reading(opened.storages, field.shape, field.dtype.itemsize, plan.lat_rows or field.sizes["lat"],
                           room.memory - plan.memory, local=spec.compute.scheduler in ("threads", "synchronous"),
                           read_room=0.7 * (room.memory - room.in_use), workers=room.workers)
    if not plan.lat_rows:  # the exact solver reads the field once, whole
        reading = Reading(ROWS, "")
    elif reading.order == ROWS and spec.compute.scheduler in ("threads", "synchronous"):
        plan, reading = _shared_chunks(spec, field, opened.storages, plan, reading, room, along_time)
    return Planned(opened, field, along_time, weights, plan, room, notes, reading)


def _shared_chunks(spec: RunSpec, field: xr.DataArray, storages: list[Storage], plan: SolverPlan, reading: Reading,
                   room: Capacity, along_time: TimeSteps) -> tuple[SolverPlan, Reading]:
    """In rows order, where blocks share chunks of the files (a compressed chunk holds more rows than a
    block), the plan made again with room for each file to keep the chunks the blocks in flight cross (its
    chunk cache, see :func:`climodes.storage.row_cache`), so that each chunk is decompressed once a pass; where
    ``compute.memory`` has no room for them, the plan as it was, and the reading says that the blocks
    decompress the chunks they share again."""
    nlat, itemsize = field.sizes["lat"], field.dtype.itemsize

    def cache(rows: int) -> int:
        return max(READ_CACHE, row_cache(storages, rows, nlat, room.workers, itemsize))

    if cache(plan.lat_rows) == READ_CACHE:
        return plan, reading
    try:
        shared = plan_solver(field.shape, spec.modes.count, spec.modes.method, room.memory, room.workers,
                             in_use=room.in_use, fitted_per_point=along_time.values_per_point,
                             read_cache=lambda rows: cache_held(storages, cache(rows), field.dtype.itemsize),
                             itemsize=working_precision(field.dtype).itemsize)
    except UserError:
        return plan, replace(reading, reason=f"{reading.reason}; no room in compute.memory to keep the chunks that "
                                             "blocks share, so each block decompresses them again")
    size = cache(shared.lat_rows)
    return shared, replace(reading, cache=size, reason=f"{reading.reason}; each file keeps {size / 1e6:.1f} MB of "
                                                       "decompressed chunks for the blocks that share them")


def _passes(method: str) -> str:
    return {"exact": "1", "gram": "2"}.get(method, f"2 to {2 + POWER_ITERATIONS}")


def check(spec: RunSpec) -> list[str]:
    """Check ``spec`` against its files and its output folder as :func:`run` would, without reading the
    field's values or writing anything; return a few lines on what the run would read, solve and write.

    Raises
    ------
    UserError
        Whatever :func:`run` would raise before its first pass over the data.
    """
    warned: list[str] = []
    with library_warnings(warned):  # the inputs first: an existing results folder must not hide their problems
        planned = _plan(spec)
        where = check_output_dir(spec)
        check_batch_commands(spec.compute)
    field, files = planned.field, planned.opened.files
    times = field["time"].values
    grid = f"{field.sizes['lat']} x {field.sizes['lon']}" + (" (curvilinear)" if GRID_LAT in field.coords else "")
    return [
        f"reads   {spec.input.variable} from {inputs_count([f.path for f in files])}, first {files[0].path}",
        f"steps   {times.size}, {str(times[0])[:10]} to {str(times[-1])[:10]}",
        f"grid    {grid} points",
        f"solver  {planned.plan.method} ({planned.plan.reason})",
        *([f"order   {planned.reading.text(_passes(planned.plan.method))}"] if planned.plan.lat_rows else []),
        f"writes  {where}",
        *(f"note: {line}" for line in planned.notes + warned),
    ]


@contextlib.contextmanager
def damaged_files(spec: RunSpec) -> Iterator[None]:
    """Turn a reader's failure to decode a chunk of the input (a damaged or cut-short file, found only when
    its values are read) into one line naming the file (found by reading the files through again) and what
    to do."""
    try:
        yield
    except (RuntimeError, OSError, ValueError) as err:
        reason = damage(err)
        if reason is None:
            raise
        variable = spec.input.variable
        found = first_damaged([p for p in expand_paths(spec.input.paths) if not is_zarr(p)], variable)
        if found is None:
            raise UserError(f"{', '.join(spec.input.paths)}: a chunk of {variable} cannot be decoded ({reason}); a "
                            "file is damaged or was copied incompletely: copy it again") from None
        path, reason = found
        raise UserError(f"{path}: a chunk of {variable} cannot be decoded ({reason}); the file is damaged or was "
                        "copied incompletely: copy it again") from None


def _scratch_folder(stage: Path | None, compute: ComputeSection) -> ContextManager[str | Path | None]:
    """Where a scratch copy of the field may go: the results' staging folder, or, for a run that writes
    nothing, a temporary folder removed when the run ends; none for such a run on batch workers, which may
    sit on other machines than this temporary folder."""
    if stage is not None:
        return contextlib.nullcontext(stage)
    if compute.scheduler in SYSTEMS:
        return contextlib.nullcontext(None)
    return tempfile.TemporaryDirectory(prefix="climodes-")


def _solve(spec: RunSpec, planned: Planned, progress: bool, scratch: str | Path | None):
    """The decomposition of the planned field (the first pass over the data happens here), where
    ``compute`` says; a streaming solver gets the field opened again in its blocks of latitude rows, or,
    when the plan reads in the files' own order (:mod:`climodes.storage`), in blocks of whole time chunks
    copied once into memory or a scratch file in ``scratch``.  Returns the modes, the decomposition, the
    point counts, the compute session (where it ran), the red-noise test (None when it was not asked for)
    and the reading order used."""
    field, along_time, plan, reading = planned.field, planned.along_time, planned.plan, planned.reading
    if reading.order == TIME and scratch is None:
        reading = Reading(ROWS, "no results folder to hold a scratch copy that the batch workers can read")
    elif reading.order == TIME and not scratch_room(Path(scratch), field.size * field.dtype.itemsize):
        reading = Reading(ROWS, f"no room for a scratch copy of the field in {scratch}")
    if plan.lat_rows:
        blocks = ({"time": -1, "lat": plan.lat_rows, "lon": -1} if reading.order == ROWS
                  else {"time": reading.time_steps, "lat": -1, "lon": -1})
        opened = rechunked(planned.opened, blocks)
        field, along_time, _ = _prepared(spec, opened)
    limit = walltime(spec.compute, plan.method, field.shape, spec.modes.count, field.dtype.itemsize,
                     planned.room.workers)
    with running(spec.compute, progress, limit, spec.source.parent,
                 chunk_bytes(planned.opened.storages, planned.field.dtype.itemsize), reading.cache,
                 slack=planned.room.memory - plan.memory - (field.nbytes * (reading.order == MEMORY))) as session:
        copied_to = None if scratch is None else Path(scratch)
        with staged(field, reading, plan.lat_rows or -1, copied_to, session.during, planned.opened.close_files) as field:
            modes, result, counts = solve(field, planned.weights, spec.modes.count, spec.prepare.max_missing, plan,
                                          spec.modes.seed, session.during, along_time)
        tested = _red_noise(spec, result, planned.weights, field.sizes["time"], session.during)
    return modes, result, counts, session, tested, reading


def _red_noise(spec: RunSpec, result: Decomposition, weights: xr.DataArray, steps: int,
               progress: Callable[[str], ContextManager]) -> NoiseTest | None:
    """The red-noise test of the kept modes when the config asks for it (``modes.noise_surrogates``)."""
    if not spec.modes.noise_surrogates:
        return None
    noise = fit_red_noise(result.point_moments, weights.values.reshape(-1), steps, weights.shape)
    with progress(f"red-noise test: {spec.modes.noise_surrogates} surrogate fields"):
        return red_noise_test(result.eigenvalues, noise, steps, spec.modes.noise_surrogates, spec.modes.noise_level,
                              spec.modes.seed)


def _diagnosed(spec: RunSpec, modes: xr.Dataset, result: Decomposition, tested: NoiseTest | None, steps: int,
               units: str | None, notes: list[str]):
    """The modes with what defends and explains them: each mode's sampling error and effective sample size,
    North's rule, the whole spectrum, the correlation maps, the residual after modes 1..k and, when they
    ran, the red-noise test and the rotation (whose notes join ``notes``)."""
    sampling = sampling_errors(result.eigenvalues, result.pcs, result.next_eigenvalue, result.next_pc,
                               spec.modes.effective_sample_size)
    correlation = correlation_maps(result.patterns, result.point_moments[:, 0], steps).T.reshape(modes["eof"].shape)
    parts = [modes, mode_diagnostics(modes, sampling, result.spectrum, result.total_variance,
                                     result.unresolved_fraction, correlation, units),
             residual_variables(modes, result.eigenvalues, result.pcs, result.step_squares, correlation, units)]
    if tested is not None:
        parts.append(noise_variables(tested, modes["mode"], units))
    if spec.modes.rotate == "varimax":
        rotated, rotation_notes = rotated_variables(modes, result.total_variance, units)
        parts.append(rotated)
        notes += rotation_notes
    return xr.merge(parts), sampling


def run(spec: RunSpec, say: Callable[[str], None] = lambda line: None, progress: bool = False,
        data: xr.DataArray | None = None, write: bool = True, command: str | None = None) -> RunSummary:
    """Run ``spec`` end to end and write its results folder.

    The folder is claimed before any data are read (:func:`climodes.output.results_folder`) and
    appears complete or not at all.

    Parameters
    ----------
    spec
        A validated run (see :func:`climodes.config.load_spec`).
    say
        Called with each note worth telling the user as the run goes.
    progress
        Draw a progress bar on stderr for each pass over the data.
    data
        The field to analyse in place of ``spec``'s input files (see :func:`climodes.fields.field_from_array`).
    write
        Write the results folder; without, nothing is written and the summary's ``results`` is all there is.
    command
        What made the run, for the results' history (default: ``climodes run CONFIG``).
    """
    started = time.monotonic()
    out = Path(spec.output.dir)
    with results_folder(spec, say) if write else contextlib.nullcontext() as stage:
        warned: list[str] = []
        with library_warnings(warned), _scratch_folder(stage, spec.compute) as scratch:
            planned = _plan(spec, data)
            with damaged_files(spec):
                modes, result, counts, session, tested, reading = _solve(spec, planned, progress, scratch)
        notes = planned.notes + counts.notes + result.notes + warned
        kept = modes.sizes["mode"]
        steps = planned.field.sizes["time"]
        units = "1" if spec.prepare.standardize else planned.opened.data.attrs.get("units")
        modes, sampling = _diagnosed(spec, modes, result, tested, steps, units, notes)
        for line in notes:
            say(f"note: {line}")
        extra = dict(errors=sampling.errors, separated=sampling.separated,
                     method=f"{result.method} (chosen because: {planned.plan.reason})",
                     notes=notes, units=units, total_variance=result.total_variance, compute=session.description,
                     command=command or history("run", spec.source),
                     elapsed=time.monotonic() - started,
                     points=(f"{counts.used} of {counts.grid} grid points used; {counts.always_missing} missing at "
                             f"every step; {counts.too_often_missing} missing too often; {counts.filled_values} "
                             "missing values set to zero anomaly"))
        results = results_dataset(modes, planned.opened, spec, extra)
        asked = f" ({spec.modes.count} asked, {kept} not null)" if kept < spec.modes.count else ""
        headline = (f"climodes: {kept} modes{asked} of {spec.input.variable} from "
                    f"{inputs_count([f.path for f in planned.opened.files])}, {steps} time steps x {counts.used} points "
                    f"({result.method.split(':')[0]} solver) "
                    f"-> {out}")
        table = variance_table(results)
        order = [f"read order: {reading.text(_passes(planned.plan.method))}"] if planned.plan.lat_rows else []
        where = [f"solver: {planned.plan.method} ({planned.plan.reason})", *order, f"compute: {session.description}",
                 *(f"moved: {line}" for line in session.moved)]
        late: list[str] = []
        if stage is not None:
            with library_warnings(late):
                late += _write(stage, results, spec, planned.opened)
            late = [line for line in late if line not in notes]  # the results read back warn as the inputs did
            for line in late:
                say(f"note: {line}")
            log = run_log(headline, table, where, notes + late, spec.to_yaml())
            _write_log(stage, log, spec)
    return RunSummary(out, headline, table, notes + late, results)


def _write(stage: Path, results: xr.Dataset, spec: RunSpec, opened: OpenedField) -> list[str]:
    """Write the results files, figures and report into the staging folder; return notes on the figures."""
    try:
        write_netcdf(results, stage / "modes.nc", opened.time_encoding)
        if "geotiff" in spec.output.formats:
            write_geotiff(results, stage / "modes.tif")
        return _drawn(stage, spec.output.figures, Path(spec.output.dir))
    except OSError as err:  # disk full, permissions, a vanished folder: nothing is left behind
        raise _cannot_write(spec, err) from None


def _write_log(stage: Path, log: str, spec: RunSpec) -> None:
    try:
        (stage / "run.log").write_text(log, encoding="utf-8")
    except OSError as err:
        raise _cannot_write(spec, err) from None


def _cannot_write(spec: RunSpec, err: OSError) -> UserError:
    reason = err.strerror or str(err)
    return UserError(f"output.dir: cannot write the results to {spec.output.dir} ({reason}); nothing was "
                     "written; free some space or choose another output.dir")


def submit(spec: RunSpec, system: str | None, dry_run: bool, wait: bool, show: Callable[[str], None],
           say: Callable[[str], None] = lambda line: None) -> int:
    """Write the batch script that runs ``spec``, ``show`` it, and submit it (unless ``dry_run``).

    The job asks for the resources the run needs, from the field's size and the solver the plan chooses
    (see :func:`climodes.cluster.batch_job`); only the field's coordinates are read.  Returns 0, or with
    ``wait`` the job's exit status.
    """
    check_output_dir(spec)
    chosen = batch_system(spec.compute, system)
    if not dry_run:
        submit_command(chosen)
    planned = _plan(spec)
    field = planned.field
    room = capacity(spec.compute, workers=submit_cores(spec.compute, planned.plan.method, field.sizes["lat"]))
    plan = plan_solver(field.shape, spec.modes.count, spec.modes.method, room.memory, room.workers,
                       in_use=room.in_use, fitted_per_point=planned.along_time.values_per_point,
                       itemsize=working_precision(field.dtype).itemsize)
    job = batch_job(spec.source, spec.compute, chosen, plan.method, field.shape, spec.modes.count,
                    field.dtype.itemsize, plan.memory, overwrite=spec.output.overwrite)
    text, path = batch_script(job, spec.compute), script_path(spec.source, chosen)
    results = Path(os.path.abspath(spec.output.dir))
    if results == Path(os.path.abspath(path)) or Path(os.path.abspath(path)) in results.parents:
        raise UserError(f"output.dir: {spec.output.dir} is where the batch script {path} goes; choose another "
                        "output.dir")
    write_script(path, text)
    show(text)
    if dry_run:
        say(f"climodes: wrote {path}; not submitted (--dry-run)")
        return 0
    return submit_script(path, chosen, wait, say)


def _drawn(stage: Path, options: FigureOptions | bool, out: Path) -> list[str]:
    """Draw a run's figures and report; a figure that fails to draw costs the figures, never the results.

    Returns the note to add when it failed (none when it did not).
    """
    try:
        publish(stage, options)
        return []
    except (UserError, OSError):
        raise
    except Exception as err:  # a drawing problem: the computed modes are kept, and the note says how to retry
        publish(stage, False)
        return [f"the figures could not be drawn ({type(err).__name__}: {err}); the results are complete; "
                f"climodes figures {out} draws them again"]


def publish(folder: Path, options: FigureOptions | bool) -> list[Path]:
    """Draw the figures of ``folder``'s ``modes.nc`` into ``folder/figures`` and write ``folder/report.html``.

    Both are drawn from ``modes.nc`` alone, so a run and a later ``climodes
    figures`` give the same images.  Each is written under a hidden name and
    renamed into place; the files written are returned.
    """
    ds = open_results(folder)
    try:
        pictures: list[Picture] = []
        written: list[Path] = []
        if options:
            from climodes.figures import replace_figures  # the numeric path never imports matplotlib

            pictures, written = replace_figures(ds, options, folder)
        report = folder / REPORT_FILE
        write_file_atomically(report, lambda path: path.write_text(report_html(ds, pictures), encoding="utf-8"),
                              replace=True)
    finally:
        ds.close()
    return [*written, report]


def redraw(results: str | Path, **overrides) -> tuple[FigureOptions, list[Path]]:
    """``climodes figures``: draw a results folder's figures and report again, without recomputing.

    The options stored in the results' config are used, with ``overrides``
    (``draw``, ``format``, ``dpi``, ``local_modes``; ``None`` keeps the stored
    one) on top; figures switched off in the run are drawn with the defaults.
    """
    target = results_path(results)
    with open_results(target) as ds:
        stored = (stored_config(ds).get("output") or {}).get("figures", True)
        count = ds.sizes["mode"]
    if (overrides.get("local_modes") or 0) > count:
        raise UserError(f"--local-modes {overrides['local_modes']}: {target} holds {count} modes; give 1 to {count}")
    try:
        options = figure_options(stored) or FigureOptions()
    except ValueError:
        options = FigureOptions()
    for key, value in overrides.items():
        try:
            options = options.changed(**{key: value})
        except ValueError as err:
            reason = str(err).split(": ", 1)[-1]
            raise UserError(f"--{key.replace('_', '-')} {value}: {reason}") from None
    try:
        with results_update(target.parent) as written:
            written += publish(target.parent, options)
            return options, written
    except OSError as err:
        raise UserError(f"{target.parent}: cannot write the figures ({err.strerror or err}); nothing was "
                        "replaced; free some space or check the folder's permissions") from None


# --- reusing the modes of a finished run: project, reconstruct, table


@dataclass
class ProjectionPlan:
    """What a projection reads and how, found from the files' coordinates and the results alone."""

    source: Path
    results: xr.Dataset
    opened_here: bool  # the results were opened for the projection (and are closed after it)
    fitted: Fitted
    opened: OpenedField
    field: xr.DataArray
    keys: TimeKeys
    order: ProjectionOrder  # the blocks the field is read in, and why
    room: Capacity
    max_missing: float
    notes: list[str]


def _training(results: xr.Dataset) -> tuple[str, list[int] | None, float]:
    """How the run of ``results`` took its means (``prepare.aggregate``), of which months, and its
    ``prepare.max_missing``."""
    config = stored_config(results)
    prepare = config.get("prepare") or {}
    return prepare.get("aggregate", "none"), (config.get("select") or {}).get("months"), prepare.get("max_missing", 0.1)


def _new_field(spec: RunSpec, opened: OpenedField, results: xr.Dataset, notes: list[str]) -> xr.DataArray:
    """The field to project: selected as ``spec`` says, averaged as the training run averaged (lazily)."""
    how, months, _ = _training(results)
    return aggregate(select(opened, spec.select), how, months, notes)


IN_MEMORY_RESULTS = Path("(results in memory)")  # how results that are no file are named in messages


def given_results(results: str | Path | xr.Dataset) -> tuple[Path, xr.Dataset, bool]:
    """The results file of a folder or path opened and checked, or results given as a Dataset checked:
    their source (the file, or :data:`IN_MEMORY_RESULTS`), the Dataset, and whether it was opened here
    (and is the caller's to close)."""
    if isinstance(results, (str, os.PathLike)):
        source = results_path(results)
        return source, open_results(source), True
    encoding = getattr(results, "encoding", None) or {}
    source = Path(encoding["source"]) if encoding.get("source") else IN_MEMORY_RESULTS
    check_results(results, source)
    return source, results, False


def _named(source: Path) -> str:
    """The absolute path of a results file, for the provenance of what is made from it."""
    return str(source if source == IN_MEMORY_RESULTS else source.resolve())


def _plan_projection(results: str | Path | xr.Dataset, spec: RunSpec, data: xr.DataArray | None = None
                     ) -> ProjectionPlan:
    """Open the results and the new field (or take ``data``), check that one applies to the other, and plan
    the blocks: every check a projection makes before it reads the field's values."""
    source, trained, mine = given_results(results)
    try:
        fitted = fitted_preparation(trained)
        how, months, max_missing = _training(trained)
        if how != "none" and spec.select.months != months:
            raise UserError(f"select.months: the modes in {source} were computed from {how} means of "
                            f"{months_text(months)} ({months}); select the same months")
        opened = opened_field(spec, data)
        notes = list(opened.notes)
        field = _new_field(spec, opened, trained, notes)
        check_same_grid(field, trained, source)
        check_same_units(field, trained, spec.input.variable, source)
        keys = keys_of(field["time"], fitted)
        room = capacity(spec.compute)
        order = plan_projection(field.shape, trained, room.memory, room.in_use, room.workers, opened.storages,
                                field.dtype.itemsize, local=spec.compute.scheduler in ("threads", "synchronous"))
    except BaseException:
        if mine:
            trained.close()
        raise
    return ProjectionPlan(source, trained, mine, fitted, opened, field, keys, order, room, max_missing, notes)


def _steps_text(fitted: Fitted) -> str:
    return ", ".join(fitted.preparation.steps + ("offset",))


def check_projection(results: str | Path, spec: RunSpec) -> list[str]:
    """``climodes project --check``: every check :func:`project` makes before reading the field's values
    (the results, the files, grid, units, calendar and months, the memory plan, the output folder);
    returns a few lines on what it would read, do and write."""
    warned: list[str] = []
    with library_warnings(warned):
        where = check_output_dir(spec, PROJECTION_FILE)
        check_batch_commands(spec.compute)
        plan = _plan_projection(results, spec)
    if plan.opened_here:
        plan.results.close()
    field = plan.field
    grid = f"{field.sizes['lat']} x {field.sizes['lon']}" + (" (curvilinear)" if GRID_LAT in field.coords else "")
    lines = projection_plan_lines(spec.input.variable, plan.opened.files, field["time"].values, grid,
                                  plan.results.sizes["mode"], plan.source, _steps_text(plan.fitted), plan.order.text,
                                  where)
    notes = [*ignored_sections_note(spec.source, spec.given, plan.source), *plan.notes, *warned]
    return lines + [f"note: {line}" for line in notes]


def project(results: str | Path | xr.Dataset, spec: RunSpec, say: Callable[[str], None] = lambda line: None,
            progress: bool = False, data: xr.DataArray | None = None, write: bool = True,
            command: str | None = None) -> RunSummary:
    """``climodes project``: the field of ``spec`` (its input and select, or ``data`` in place of its input)
    projected onto the modes of ``results`` (a folder, its ``modes.nc`` or their Dataset), prepared with the
    preparation fitted there; writes ``<output.dir>/projection.nc`` unless not to ``write``.  ``command``
    is what made it, for the history (default: ``climodes project RESULTS CONFIG``).

    The output folder is claimed, staged and put in place as a run's results folder is (never a
    training run's folder); the field is read once, in blocks within ``compute.memory`` (whole maps in
    the files' own order where they store whole maps together, slabs of whole chunks along time where they
    are compressed in tiles, else latitude rows: :func:`climodes.reuse.plan_projection`), on the scheduler
    of ``compute``.
    """
    started = time.monotonic()
    out = Path(spec.output.dir)
    with results_folder(spec, say, PROJECTION_FILE) if write else contextlib.nullcontext() as stage:
        warned: list[str] = []
        with library_warnings(warned):
            plan = _plan_projection(results, spec, data)
        with contextlib.closing(plan.results) if plan.opened_here else contextlib.nullcontext(plan.results) \
                as trained:
            with library_warnings(warned):
                opened = rechunked(plan.opened, plan.order.chunks)
                field = _new_field(spec, opened, trained, [])
                limit = walltime(spec.compute, "gram", field.shape, trained.sizes["mode"], field.dtype.itemsize,
                                 plan.room.workers)
                with running(spec.compute, progress, limit, spec.source.parent,
                             chunk_bytes(opened.storages, field.dtype.itemsize)) as session:
                    with damaged_files(spec), keeping_chunks(READ_CACHE):
                        opened.close_files()  # opened again, with the small cache, as the blocks are read
                        try:
                            products, squares, fraction = projected(field, trained, plan.fitted, plan.keys,
                                                                    session.during, plan.order)
                        finally:
                            opened.close_files()
            check_points(fraction, trained, field, plan.max_missing, plan.source)
            used = trained["point_status"].values.reshape(-1) == 2
            filled = int(round(float(np.sum(fraction[used])) * field.sizes["time"]))
            ignored = ignored_sections_note(spec.source, spec.given, plan.source) if data is None else []
            notes = [*ignored, *plan.notes, *warned]
            if filled:
                notes.append(f"set {filled} missing values at {int(np.sum(fraction[used] > 0))} points to zero anomaly")
            extra = dict(method=f"projection onto the EOFs of {plan.source} ({plan.order.text})", notes=notes,
                         compute=session.description, elapsed=time.monotonic() - started,
                         points=f"{int(used.sum())} grid points of the modes; {filled} missing values set to zero "
                                "anomaly",
                         command=command or history("project", plan.source if isinstance(results, xr.Dataset)
                                                    else os.path.abspath(results), spec.source))
            ds = projection_dataset(projection_variables(trained, products, squares, field["time"]), opened, spec,
                                    extra, time_bounds(field), _named(plan.source), trained)
        for line in notes:
            say(f"note: {line}")
        headline = projection_headline(spec.input.variable, [f.path for f in opened.files], field.sizes["time"],
                                       ds.sizes["mode"], plan.source, out)
        table = projection_table(ds)
        try:
            if stage is not None:
                write_netcdf(ds, stage / PROJECTION_FILE, opened.time_encoding)
                (stage / "projection.log").write_text(
                    run_log(headline, table, [f"read order: {plan.order.text}", f"compute: {session.description}"],
                            notes, spec.projection_yaml()),
                    encoding="utf-8")
        except OSError as err:
            raise _cannot_write(spec, err) from None
    return RunSummary(out, headline, table, notes, ds)


def _time_encoding(results: xr.Dataset) -> dict:
    return {k: v for k, v in results[time_name(results)].encoding.items() if k in ("units", "calendar", "dtype")}


def reconstruct(results: str | Path, modes: str, out: str | Path, anomalies: bool = False,
                overwrite: bool = False, memory: str | None = None) -> str:
    """``climodes reconstruct``: the field rebuilt from the chosen modes of ``results`` (full values, or
    ``anomalies``), written as CF NetCDF to ``out`` block by block, atomically, within ``memory`` (by
    default the run's ``compute.memory``); an existing ``out`` is replaced only with ``overwrite`` and only
    if climodes wrote it.  Returns the line to print."""
    if memory is not None:
        try:
            checked_memory(memory)
        except ValueError as err:
            raise UserError(f"--memory: {err}") from None
    source, out = results_path(results), Path(out)
    if source.exists() and out.exists() and os.path.samefile(source, out):
        raise UserError(f"-o {out}: is the results file the modes are read from; give another name")
    check_output_file(out, overwrite)
    if out.suffix != ".nc":
        raise UserError(f"-o {out}: give a NetCDF file name ending in .nc")
    with open_results(source) as trained:
        command = history("reconstruct", os.path.abspath(results), "--modes", modes, "-o", os.path.abspath(out),
                          *(["--anomalies"] * anomalies))
        try:
            ds, which = rebuilt(trained, source, modes, anomalies, command, memory)
        except UserError as err:
            text = str(err)
            if not text.startswith("compute.memory:"):
                raise
            raise UserError(f"--memory:{text.removeprefix('compute.memory:')}" if memory else
                            f"{text}; the run's compute.memory is used: give more with --memory") from None
        try:
            with dask.config.set(scheduler="synchronous"):  # one block at a time
                write_file_atomically(out, lambda path: write_netcdf(ds, path, _time_encoding(trained),
                                                                     time_name(trained)), replace=overwrite)
        except OSError as err:
            raise UserError(f"-o {out}: cannot write it ({err.strerror or err}); nothing was written") from None
        return reconstruction_line(ds, modes_text(which), anomalies, out)


def rebuilt(trained: xr.Dataset, source: Path, modes: str, anomalies: bool,
            command: str, memory: str | None = None) -> tuple[xr.Dataset, list[int]]:
    """The reconstruction from the ``modes`` (``1-3``, ``1,4``) of the results ``trained`` read from ``source``,
    as a lazy CF dataset (``command`` goes to its history), planned within ``memory`` (by default the run's
    ``compute.memory``), and the mode numbers chosen."""
    which = chosen_modes(modes, trained["mode"].values)
    memory = memory or (stored_config(trained).get("compute") or {}).get("memory", ComputeSection.memory)
    data = reconstruction(trained, which, anomalies, run_memory(ComputeSection(memory=memory)))
    return reconstruction_dataset(trained, data, which, anomalies, _named(source), command), which


def table(results: str | Path, out: str | Path, overwrite: bool = False) -> str:
    """``climodes table``: the PCs, the residual fractions and each step's variance of ``results``, one row
    per time step, as CSV or Parquet (by the extension of ``out``), written atomically; an existing
    ``out`` is replaced only with ``overwrite`` and only if climodes wrote it.  Returns the line to print."""
    source, out = results_path(results), Path(out)
    check_output_file(out, overwrite)
    if out.suffix not in (".csv", ".parquet"):
        raise UserError(f"-o {out}: give a file name ending in .csv or .parquet")
    with open_results(source) as trained:
        frame = coefficient_table(trained)
        write = table_writer(frame, table_comment(source, trained),
                             {"source": f"climodes {__version__}", "climodes_results": str(source.resolve()),
                              "title": table_comment(source, trained)}, out.suffix)
    try:
        write_file_atomically(out, write, replace=overwrite)
    except OSError as err:
        raise UserError(f"-o {out}: cannot write it ({err.strerror or err}); nothing was written") from None
    return table_line(frame, out)
