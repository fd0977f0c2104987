"""Subcommands ``cohort`` and ``demo`` of the ``surfacekit`` command."""
from __future__ import annotations

import csv
import sys
from pathlib import Path

from .cli import Context, InputError
from .cli_util import existing


# ---------------------------------------------------------------- cohort
def _cohort_args(p):
    p.add_argument("manifest", help="cohort CSV: subject,path,label,group,role,age,sex")
    p.add_argument("-o", "--output", required=True, help="output folder")
    p.add_argument("--template", help="template surface (overrides the manifest's template row)")
    p.add_argument("--workers", type=int, default=1, help="local worker processes (default 1)")
    p.add_argument("--target-vertices", type=int, default=3000,
                   help="resample every surface to about this many vertices (default 3000)")
    p.add_argument("--permutations", type=int, default=2000,
                   help="permutations of the vertex-wise group test (default 2000)")
    p.add_argument("--resume", action="store_true",
                   help="work inside an existing output folder, reusing finished subjects "
                        "(otherwise the folder is written only when the whole run succeeded)")


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
    import surfacekit as sk

    a = ctx.args
    if a.workers < 1:
        raise InputError(f"--workers must be at least 1, got {a.workers}")
    manifest = existing(a.manifest, "manifest")
    check_manifest(manifest)
    if a.template:
        existing(a.template, "template")
    if a.resume:  # the engine's own per-subject cache makes partial runs safe to continue
        out = Path(a.output)
        out.mkdir(parents=True, exist_ok=True)
    else:
        out = ctx.outputs.claim(a.output, directory=True)
    result = sk.run_cohort(manifest, out, a.template, workers=a.workers,
                           target_vertices=a.target_vertices, n_permutations=a.permutations,
                           seed=a.seed, progress=not ctx.quiet and sys.stderr.isatty())
    if result.n_failed == result.n_subjects:
        raise InputError(f"every subject failed; first: {result.failed[0][0]}: {result.failed[0][1]}")
    ctx.say(result.summary().replace(str(out), str(a.output)))  # staged -> final folder name
    return {"manifest": manifest.name, "output": str(a.output), "subjects": result.n_subjects,
            "failed": result.n_failed, "tables": {k: Path(v).name for k, v in result.tables.items()}}


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
