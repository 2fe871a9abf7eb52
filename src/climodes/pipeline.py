"""A whole run, stage after stage: open, select, prepare, weight, solve, diagnose, write.

Each stage is a function of the previous one's result (see ``GUIDE``'s flow);
this module only calls them in order and collects what the user should hear.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, ContextManager

import xarray as xr

from climodes.cluster import dask_settings, pass_context, resident_bytes, worker_count
from climodes.config import RunSpec, memory_bytes
from climodes.diagnostics import correlation_maps, mode_diagnostics, sampling_errors
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
from climodes.report import mode_table
from climodes.significance import NoiseTest, fit_red_noise, noise_variables, red_noise_test
from climodes.solvers import Decomposition, plan_solver, solve
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


def _red_noise(spec: RunSpec, result: Decomposition, weights: xr.DataArray, steps: int,
               progress: Callable[[str], ContextManager]) -> NoiseTest | None:
    """The red-noise test of the kept modes when the config asks for it (``modes.noise_surrogates``)."""
    if not spec.modes.noise_surrogates:
        return None
    noise = fit_red_noise(result.point_moments, weights.values.reshape(-1), steps, weights.shape)
    with progress(f"red-noise test: {spec.modes.noise_surrogates} surrogate fields"):
        return red_noise_test(result.eigenvalues, noise, steps, spec.modes.noise_surrogates, spec.modes.noise_level,
                              spec.modes.seed)


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
        tested = _red_noise(spec, result, weights, steps, pass_context(progress, workers))
    notes += counts.notes + result.notes
    sampling = sampling_errors(result.eigenvalues, result.pcs, result.next_eigenvalue, result.next_pc,
                               spec.modes.effective_sample_size)
    for line in notes:
        say(f"note: {line}")

    units = "1" if spec.prepare.standardize else opened.data.attrs.get("units")
    correlation = correlation_maps(result.patterns, result.point_moments[:, 0], steps)
    modes = xr.merge([modes, mode_diagnostics(modes, sampling, result.spectrum, result.total_variance,
                                              result.unresolved_fraction,
                                              correlation.T.reshape(modes["eof"].shape), units)])
    if tested is not None:
        modes = xr.merge([modes, noise_variables(tested, modes["mode"], units)])
    extra = dict(errors=sampling.errors, separated=sampling.separated,
                 method=f"{result.method} (chosen because: {plan.reason})",
                 notes=notes, units=units, total_variance=result.total_variance,
                 points=(f"{counts.used} of {counts.grid} grid points used; {counts.always_missing} missing at every "
                         f"step; {counts.too_often_missing} missing too often; {counts.filled_values} missing "
                         "values set to zero anomaly"))
    results = results_dataset(modes, opened, spec, extra)
    out = Path(spec.output.dir)
    headline = (f"climodes: {spec.modes.count} modes of {spec.input.variable} from {len(opened.files)} file(s), "
                f"{steps} time steps x {counts.used} points ({result.method.split(':')[0]} solver) -> {out}")
    table = mode_table(results)
    log = [headline, *table, f"solver: {plan.method} ({plan.reason})", *(f"note: {n}" for n in notes), "",
           "resolved config:", spec.to_yaml()]
    try:
        with staged_dir(out) as stage:
            write_netcdf(results, stage / "modes.nc", opened.time_encoding)
            if "geotiff" in spec.output.formats:
                write_geotiff(results, stage / "modes.tif")
            if spec.output.figures:
                from climodes.figures import draw_all  # the numeric path never imports matplotlib

                draw_all(results, stage)
            (stage / "run.log").write_text("\n".join(log), encoding="utf-8")
    except OSError as err:  # disk full, permissions, a vanished folder: nothing was left behind
        reason = err.strerror or str(err)
        raise UserError(f"output.dir: cannot write the results to {out} ({reason}); nothing was written; "
                        "free some space or choose another output.dir") from None
    return RunSummary(out, headline, table, notes)
