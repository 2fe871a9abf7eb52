"""The ``climodes`` command: subcommands, exit codes and what is printed; no science here.

Exit codes: 0 success, 2 a problem with the user's input (one line each, no
traceback), 1 an internal error (a bug: the traceback is printed to report it),
130 interrupted by SIGINT (Ctrl-C), 143 stopped by SIGTERM (128 + the signal's
number, the shell's convention).
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import signal
import sys
import traceback
import warnings

from climodes import __version__
from climodes.errors import ConfigError, UserError


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="climodes",
        description="Dominant modes of variability (EOFs and PCs) of gridded climate fields.",
    )
    parser.add_argument("--version", action="version", version=f"climodes {__version__}")
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    check = commands.add_parser("check", help="validate a config; print it with every default filled in")
    check.add_argument("config", help="YAML run configuration")
    check.add_argument("--overwrite", action="store_true", help="check as run --overwrite would run")
    commands.add_parser("template", help="print a commented config with every key, to start from")
    run = commands.add_parser("run", help="run a config into its results folder")
    run.add_argument("config", help="YAML run configuration")
    run.add_argument("-q", "--quiet", action="store_true", help="print nothing but errors")
    run.add_argument("--overwrite", action="store_true", help="replace an existing results folder")
    show = commands.add_parser("show", help="summarise a results folder on one screen")
    show.add_argument("results", help="results folder or its modes.nc")
    figures = commands.add_parser("figures", help="redraw the figures and report.html, no recomputing",
                                  description="Draw a results folder's figures and report.html again from its "
                                  "modes.nc (no recomputing); options override the run's output.figures.")
    figures.add_argument("results", help="results folder or its modes.nc")
    figures.add_argument("--draw", metavar="KINDS", help="comma-separated: maps, series, pairs, spectrum, residuals")
    figures.add_argument("--format", help="png, svg or pdf")
    figures.add_argument("--dpi", help="resolution in dots per inch (50 to 1200)")
    figures.add_argument("--local-modes", metavar="K", help="draw the local variance explained by modes 1..K")
    project = commands.add_parser("project", help="project another field onto the modes",
                                  description="Project another field (a config's input and select) onto the modes "
                                  "of a results folder; writes projection.nc into the config's output.dir.")
    project.add_argument("results", help="results folder or its modes.nc")
    project.add_argument("config", help="YAML run configuration of the other field (its prepare and modes are "
                                        "not used)")
    project.add_argument("--check", action="store_true", help="only check the field, the results and the output "
                                                               "folder, without reading the field's values")
    project.add_argument("-q", "--quiet", action="store_true", help="print nothing but errors")
    project.add_argument("--overwrite", action="store_true", help="replace an existing projection folder")
    reconstruct = commands.add_parser("reconstruct", help="rebuild the field from chosen modes")
    reconstruct.add_argument("results", help="results folder or its modes.nc")
    reconstruct.add_argument("--modes", required=True, help="modes to use, e.g. 1-3 or 1,4")
    reconstruct.add_argument("-o", "--output", required=True, metavar="FILE.nc", help="NetCDF file to write")
    reconstruct.add_argument("--anomalies", action="store_true", help="write the anomalies, not the full values")
    reconstruct.add_argument("--overwrite", action="store_true", help="replace FILE if climodes wrote it")
    reconstruct.add_argument("--memory", metavar="SIZE", help="memory it may use, e.g. 2GB (default: the run's compute.memory)")
    table = commands.add_parser("table", help="write the PCs per time step as .csv or .parquet",
                               description="Write the PCs and residual fractions, one row per time step, as .csv "
                               "or .parquet.")
    table.add_argument("results", help="results folder or its modes.nc")
    table.add_argument("-o", "--output", required=True, metavar="FILE", help="table to write: .csv or .parquet")
    table.add_argument("--overwrite", action="store_true", help="replace FILE if climodes wrote it")
    submit = commands.add_parser("submit", help="write and submit a batch job that runs a config",
                                 description="Write a batch script that runs a config, show it and submit it "
                                 "(sbatch or qsub).")
    submit.add_argument("config", help="YAML run configuration")
    submit.add_argument("--dry-run", action="store_true", help="only write the script beside the config and print it")
    submit.add_argument("--wait", action="store_true", help="wait for the job to end and exit with its exit status")
    submit.add_argument("--system", choices=["slurm", "pbs"],
                        help="batch system (default: compute.scheduler if slurm or pbs, else the one installed)")
    submit.add_argument("--overwrite", action="store_true", help="the job's run replaces an existing results folder")
    return parser


def _redraw(args: argparse.Namespace) -> str:
    from climodes.pipeline import redraw

    def whole(value: str | None) -> int | str | None:
        return int(value) if value is not None and value.strip().isdigit() else value

    options, written = redraw(args.results, draw=args.draw.split(",") if args.draw else None,
                              format=args.format, dpi=whole(args.dpi), local_modes=whole(args.local_modes))
    figures = len(written) - 1
    where = written[-1].parent
    return (f"climodes: drew {figures} figure(s) ({options.format}, {options.dpi} dpi) into {where / 'figures'} "
            f"and wrote {written[-1]}")


def _project(args: argparse.Namespace, spec) -> int:
    from climodes.cluster import show_progress
    from climodes.pipeline import check_projection, project

    if args.check:
        print("\n".join(check_projection(args.results, spec)), file=sys.stderr)
        return 0
    say = (lambda line: None) if args.quiet else (lambda line: print(line, file=sys.stderr))
    summary = project(args.results, spec, say, progress=show_progress(args.quiet))
    if not args.quiet:
        print(summary.text())
    return 0


class Stopped(KeyboardInterrupt):
    """SIGTERM (a batch system ending a job, ``kill``): cleaned up like Ctrl-C, with its own exit code."""


def _stop(signum, frame):  # noqa: ARG001  (signal handler signature)
    raise Stopped


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``climodes`` console script; returns the exit code."""
    parser = _parser()
    if not (sys.argv[1:] if argv is None else argv):  # no command at all: what there is to do
        parser.print_help(sys.stderr)
        return 2
    args = parser.parse_args(argv)
    signal.signal(signal.SIGTERM, _stop)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the run turns the warnings worth telling into notes
        return _command(args)


def _command(args: argparse.Namespace) -> int:
    from climodes.config import load_spec

    try:
        if args.command == "show":
            from climodes.report import summary

            print(summary(args.results))
            return 0
        if args.command == "figures":
            print(_redraw(args))
            return 0
        if args.command == "template":
            from climodes.config import template

            print(template(), end="")
            return 0
        if args.command == "reconstruct":
            from climodes.pipeline import reconstruct

            print(reconstruct(args.results, args.modes, args.output, args.anomalies, args.overwrite, args.memory))
            return 0
        if args.command == "table":
            from climodes.pipeline import table

            print(table(args.results, args.output, args.overwrite))
            return 0
        spec = load_spec(args.config)  # config problems are found here, before the big imports
        if args.overwrite:
            spec = dataclasses.replace(spec, output=dataclasses.replace(spec.output, overwrite=True))
        if args.command == "project":
            return _project(args, spec)
        if args.command == "check":
            from climodes.pipeline import check

            described = check(spec)
            print(spec.to_yaml(), end="")
            print("\n".join(described), file=sys.stderr)
            return 0
        if args.command == "submit":
            from climodes.pipeline import submit

            return submit(spec, args.system, args.dry_run, args.wait, show=lambda text: print(text, end="", flush=True),
                          say=lambda line: print(line, file=sys.stderr, flush=True))
        from climodes.cluster import show_progress
        from climodes.pipeline import run

        say = (lambda line: None) if args.quiet else (lambda line: print(line, file=sys.stderr))
        summary = run(spec, say, progress=show_progress(args.quiet))
        if not args.quiet:
            print(summary.text())
        return 0
    except ConfigError as err:
        for problem in err.problems:
            print(problem, file=sys.stderr)
        return 2
    except UserError as err:
        print(f"climodes: error: {err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt as err:
        print(f"climodes: {'stopped' if isinstance(err, Stopped) else 'interrupted'}; no results were written",
              file=sys.stderr)
        return 143 if isinstance(err, Stopped) else 130
    except BrokenPipeError:  # the reader went away (climodes show ... | head): nothing more to say
        sys.stdout = open(os.devnull, "w")  # so the interpreter's last flush does not complain either
        return 0
    except Exception:  # a bug: show everything needed to report it
        traceback.print_exc()
        print("climodes: internal error (a bug in climodes); please report it with the lines above", file=sys.stderr)
        return 1
