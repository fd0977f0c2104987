"""Subcommands ``cohort`` and ``demo`` of the ``surfacekit`` command."""
from __future__ import annotations

import csv
import sys
from pathlib import Path

from .cli_util import DEMO_DATA as D
from .cli_util import existing
from .context import EXIT_SOME_FAILED, Command, Context, InputError, emit, writable_folder
from .unit_options import units_for


# ---------------------------------------------------------------- cohort
def _cohort_args(p):
    p.add_argument("manifest", help="cohort CSV: subject,path,label,group,role,age,sex; with a "
                                    "date or time_years column, several rows per subject form "
                                    "its series of scans (series.csv, series_report.html)")
    p.add_argument("-o", "--output", required=True, help="output folder")
    p.add_argument("--template", help="template surface (overrides the manifest's template row)")
    p.add_argument("--workers", type=int, default=1, help="local worker processes (default 1)")
    p.add_argument("--target-vertices", type=int, default=3000,
                   help="resample every surface to about this many vertices (default 3000)")
    p.add_argument("--permutations", type=int, default=2000,
                   help="permutations of the vertex-wise group test (default 2000)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on a Dask cluster, e.g. tcp://10.0.0.5:8786 (needs the 'cluster' extra; "
                        "workers must see the inputs and the output folder at the same paths)")
    p.add_argument("--units", default="mm", metavar="UNITS",
                   help="length unit of mesh files whose manifest 'units' cell is blank or absent: "
                        "mm (default), cm, m, or the size of one file unit in mm")


def check_manifest(path: Path) -> None:
    """Fail fast on a manifest that is not a cohort CSV (the engine checks the rest)."""
    required = {"subject", "path", "group", "role"}
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            header = next(csv.reader(fh), [])
    except UnicodeDecodeError:
        raise InputError(f"{path.name} is not a text CSV file") from None
    missing = required - {h.strip() for h in header}
    if missing:
        raise InputError(f"{path.name} is not a cohort manifest: missing column(s) "
                         f"{', '.join(sorted(missing))}")


def _cohort(ctx: Context) -> dict:
    from ..cohort import run_cohort
    from ..cohort.run import CohortFailedError

    a = ctx.args
    if a.workers < 1:
        raise InputError(f"--workers must be at least 1, got {a.workers}")
    manifest = existing(a.manifest, "manifest")
    check_manifest(manifest)
    units = units_for(a.units, ["manifest meshes"])[0]
    if a.template:
        existing(a.template, "template")
    # The cohort folder is written in place, subject by subject (each file atomically,
    # a completion marker last), so an interrupted run resumes where it stopped and a
    # re-run skips finished subjects; --force recomputes them all.
    out = Path(a.output)
    if out.exists() and not out.is_dir():
        raise InputError(f"output {out} exists and is a file")
    writable_folder(out)
    try:
        result = run_cohort(manifest, out, a.template, workers=a.workers, scheduler=a.scheduler,
                            target_vertices=a.target_vertices, n_permutations=a.permutations,
                            seed=a.seed, progress=not ctx.quiet and sys.stderr.isatty(),
                            force=a.force, units=units)
    except CohortFailedError as exc:  # exit 2; the errors stay in cohort_summary.csv
        raise InputError(str(exc)) from None
    ctx.say(result.summary())
    summary = {"manifest": manifest.name, "output": str(out), "subjects": result.n_subjects,
               "failed": result.n_failed, "computed": result.n_computed, "cached": result.n_cached,
               "tables": {k: Path(v).name for k, v in result.tables.items()}}
    if result.n_failed:
        emit(f"surfacekit: {result.n_failed} of {result.n_subjects} subjects failed "
             f"(see {out / 'cohort_summary.csv'})")
        summary["exit_code"] = EXIT_SOME_FAILED
    if result.series:  # a series manifest: trajectories and rate maps in series_report.html
        from ..cohort.manifest import read_manifest
        from .series_report import write_series_report

        template = read_manifest(manifest, template=a.template, units=units).template
        summary["report"] = write_series_report(out, template).name
        failed = sum(s["status"] == "failed" for s in result.series)
        if failed:
            emit(f"surfacekit: the series of {failed} of {result.n_subjects} subjects failed "
                 f"(see {out / 'series.csv'})")
            summary["exit_code"] = EXIT_SOME_FAILED
    return summary


# ---------------------------------------------------------------- demo
def _demo_args(p):
    p.add_argument("-o", "--output", default="surfacekit-demo",
                   help="output folder (default ./surfacekit-demo)")
    p.add_argument("--size", choices=("full", "small"), default="full",
                   help="small: coarser meshes and 8 subjects, for quick checks")


def _demo(ctx: Context) -> dict:
    from .demo import run_demo

    out = ctx.outputs.claim(ctx.args.output, directory=True)
    return run_demo(out, size=ctx.args.size, seed=ctx.args.seed, quiet=ctx.quiet,
                    display_root=Path(ctx.args.output))


COHORT = Command("cohort", "cohort run from a manifest",
                 "Prepare, match to the template and compare groups for every subject of a manifest.",
                 f"surfacekit cohort {D}/demo_cohort.csv -o cohort_out", _cohort_args, _cohort)
DEMO = Command("demo", "run the synthetic demo end to end",
               "Generate an invented, synthetic kidney follow-up study and run the whole job on it.",
               "surfacekit demo -o surfacekit-demo", _demo_args, _demo)
