"""A whole run, stage after stage: open, select, prepare, weight, solve, diagnose, write.

Each stage is a function of the previous one's result (see ``GUIDE``'s flow);
this module only calls them in order and collects what the user should hear.
"""

from __future__ import annotations

import os
import socket
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import xarray as xr

from climodes.cluster import dask_settings, pass_context, resident_bytes, worker_count
from climodes.config import FigureOptions, RunSpec, figure_options, memory_bytes
from climodes.diagnostics import effective_sample_size, north_errors, separated
from climodes.errors import UserError
from climodes.fields import OpenedField, open_field, rechunked, select
from climodes.output import (
    check_geotiff_grid,
    check_output_dir,
    results_dataset,
    staged_dir,
    write_geotiff,
    write_netcdf,
)
from climodes.prepare import TimeSteps, time_steps
from climodes.report import REPORT_FILE, Picture, report_html, run_log, stored_config, variance_table
from climodes.results import open_results, results_path
from climodes.solvers import plan_solver, solve
from climodes.weights import field_weights


@dataclass
class RunSummary:
    """What a finished run tells the user."""

    output_dir: Path
    headline: str
    table: list[str]
    notes: list[str] = field(default_factory=list)

    def text(self) -> str:
        return "\n".join([self.headline, *self.table])


def _prepared(spec: RunSpec, opened: OpenedField) -> tuple[xr.DataArray, TimeSteps, list[str]]:
    """Select the opened field and take its seasonal or annual means, lazily: only coordinates are read.

    The steps along time that follow (anomalies, trend, standardising) go to the solver to apply.
    """
    notes = list(opened.notes)
    field, steps = time_steps(select(opened, spec.select), spec.prepare, spec.select.months, notes)
    return field, steps, notes


def run(spec: RunSpec, say: Callable[[str], None] = lambda line: None, progress: bool = False) -> RunSummary:
    """Run ``spec`` end to end and write its results folder.

    Parameters
    ----------
    spec
        A validated run (see :func:`climodes.config.load_spec`).
    say
        Called with each note worth telling the user as the run goes.
    progress
        Draw a progress bar on stderr for each pass over the data.
    """
    started = time.monotonic()
    check_output_dir(spec.output)
    opened = open_field(spec.input, spec.select)
    field, along_time, notes = _prepared(spec, opened)
    workers = worker_count(spec.compute)
    plan = plan_solver(field.shape, spec.modes.count, spec.modes.method, memory_bytes(spec.compute.memory), workers,
                       in_use=resident_bytes())
    if plan.lat_rows:
        opened = rechunked(opened, {"time": -1, "lat": plan.lat_rows, "lon": -1})
        field, along_time, notes = _prepared(spec, opened)
    steps = field.sizes["time"]
    if steps < spec.modes.count + 1:
        raise UserError(f"modes.count: {spec.modes.count} modes need at least {spec.modes.count + 1} time steps, "
                        f"but the prepared field has {steps}; lower modes.count or lengthen select.period")
    if "geotiff" in spec.output.formats:
        check_geotiff_grid(field)
    weights = field_weights(field, spec.prepare.weighting)
    with dask_settings(spec.compute):
        modes, result, counts = solve(field, weights, spec.modes.count, spec.prepare.max_missing, plan,
                                      spec.modes.seed, pass_context(progress, workers), along_time)
    notes += counts.notes + result.notes
    n_eff, n_eff_how = effective_sample_size(result.pcs, spec.modes.effective_sample_size)
    errors = north_errors(result.eigenvalues, n_eff)
    apart = separated(result.eigenvalues, errors, result.next_eigenvalue)
    for line in notes:
        say(f"note: {line}")

    units = "1" if spec.prepare.standardize else opened.data.attrs.get("units")
    extra = dict(errors=errors, separated=apart, n_eff=n_eff, n_eff_how=n_eff_how,
                 method=f"{result.method} (chosen because: {plan.reason})",
                 notes=notes, units=units, total_variance=result.total_variance,
                 elapsed=time.monotonic() - started,
                 compute=f"{spec.compute.scheduler} scheduler, {workers} worker(s), on {socket.gethostname()}",
                 points=(f"{counts.used} of {counts.grid} grid points used; {counts.always_missing} missing at every "
                         f"step; {counts.too_often_missing} missing too often; {counts.filled_values} missing "
                         "values set to zero anomaly"))
    results = results_dataset(modes, opened, spec, extra)
    out = Path(spec.output.dir)
    headline = (f"climodes: {spec.modes.count} modes of {spec.input.variable} from {len(opened.files)} file(s), "
                f"{steps} time steps x {counts.used} points ({result.method.split(':')[0]} solver) -> {out}")
    table = [*variance_table(results), f"effective sample size {n_eff:.0f} of {steps} steps"]
    try:
        with staged_dir(out) as stage:
            write_netcdf(results, stage / "modes.nc", opened.time_encoding)
            if "geotiff" in spec.output.formats:
                write_geotiff(results, stage / "modes.tif")
            notes += _drawn(stage, spec.output.figures, out, say)
            log = run_log(headline, table, f"{plan.method} ({plan.reason})", notes, spec.to_yaml())
            (stage / "run.log").write_text(log, encoding="utf-8")
    except OSError as err:  # disk full, permissions, a vanished folder: nothing was left behind
        reason = err.strerror or str(err)
        raise UserError(f"output.dir: cannot write the results to {out} ({reason}); nothing was written; "
                        "free some space or choose another output.dir") from None
    return RunSummary(out, headline, table, notes)


def _drawn(stage: Path, options: FigureOptions | bool, out: Path, say: Callable[[str], None]) -> list[str]:
    """Draw a run's figures and report; a figure that fails to draw costs the figures, never the results.

    Returns the note to add when it failed (none when it did not).
    """
    try:
        publish(stage, options)
        return []
    except (UserError, OSError):
        raise
    except Exception as err:  # a drawing problem: the computed modes are kept, and the note says how to retry
        line = (f"the figures could not be drawn ({type(err).__name__}: {err}); the results are complete; "
                f"climodes figures {out} draws them again")
        say(f"note: {line}")
        publish(stage, False)
        return [line]


def publish(folder: Path, options: FigureOptions | bool) -> list[Path]:
    """Draw the figures of ``folder``'s ``modes.nc`` into ``folder/figures`` and write ``folder/report.html``.

    Both are drawn from ``modes.nc`` alone, so a run and a later ``climodes
    figures`` give the same images.  Each is written under a hidden name and
    renamed into place; the files written are returned.
    """
    ds = open_results(folder)
    try:
        written: list[Path] = []
        pictures: list[Picture] = []
        if options:
            from climodes.figures import replace_figures  # the numeric path never imports matplotlib

            pictures, written = replace_figures(ds, options, folder)
        report = folder / REPORT_FILE
        hidden = folder / f".{REPORT_FILE}.partial"
        hidden.write_text(report_html(ds, pictures), encoding="utf-8")
        os.replace(hidden, report)
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
        return options, publish(target.parent, options)
    except OSError as err:
        raise UserError(f"{target.parent}: cannot write the figures ({err.strerror or err}); nothing was "
                        "replaced; free some space or check the folder's permissions") from None
