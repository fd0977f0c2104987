"""Subcommands of the ``surfacekit`` command: one per stage of the job.

Each command reads its inputs (failing fast with a one-line message), calls the
library, and writes its outputs through ``ctx.outputs`` (staged, atomic, never
replacing an existing output without ``--force``).  Examples in ``--help`` use
the files that ``surfacekit demo -o surfacekit-demo`` writes, so they run as shown.
"""
from __future__ import annotations

import argparse
import csv
import json
import sys
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from .cli import Context, InputError

VOLUME_SUFFIXES = (".nii", ".nii.gz")
MESH_SUFFIXES = (".ply", ".obj", ".stl", ".off", ".gii", ".vtk")
D = "surfacekit-demo/data"


@dataclass
class Command:
    name: str
    help: str
    description: str
    example: str
    arguments: Callable[[argparse.ArgumentParser], None]
    run: Callable[[Context], dict]


def _existing(path: str, what: str = "input") -> Path:
    p = Path(path)
    if not p.exists():
        raise InputError(f"{what} not found: {p}")
    if p.is_dir():
        raise InputError(f"{what} is a folder, expected a file: {p}")
    return p


def _is_volume(path: Path) -> bool:
    return path.name.lower().endswith(VOLUME_SUFFIXES)


def load_surface(path: str, what: str = "mesh"):
    """Load a mesh for a command; bad files become one-line input errors."""
    import surfacekit as sk

    p = _existing(path, what)
    if _is_volume(p):
        raise InputError(f"{p.name} is a label volume; run 'surfacekit prepare {p} -o mesh.ply' first")
    if not p.name.lower().endswith(MESH_SUFFIXES):
        raise InputError(f"unsupported {what} format: {p.name} (use {', '.join(MESH_SUFFIXES)})")
    try:
        return sk.load(p)
    except sk.SurfaceError as exc:
        raise InputError(f"cannot read {p.name}: {exc}") from None


def _write_json(path: Path, data: dict) -> None:
    from .cli import _json_default

    path.write_text(json.dumps(data, indent=2, sort_keys=True, default=_json_default) + "\n")


def _input_record(path: Path, surface=None) -> dict:
    import hashlib

    h = hashlib.sha256(path.read_bytes()).hexdigest()[:16] if path.is_file() else ""
    rec = {"file": path.name, "sha256 (first 16)": h}
    if surface is not None:
        rec.update(vertices=surface.n_vertices, faces=surface.n_faces)
    return rec


# ---------------------------------------------------------------- inspect
def _inspect_args(p):
    p.add_argument("mesh", help="surface mesh (.ply .obj .stl .off .gii .vtk)")
    p.add_argument("-o", "--output", help="also write the quality summary to this .json file")


def surface_facts(s) -> dict:
    """Basic geometric facts of a surface (mm, mm², ml)."""
    return {"vertices": s.n_vertices, "faces": s.n_faces, "area_mm2": float(s.area),
            "volume_ml": float(s.volume) / 1000.0, "closed": bool(s.is_closed),
            "edge_manifold": bool(s.is_edge_manifold), "components": int(s.n_components),
            "genus": int(s.genus) if s.is_closed and s.is_edge_manifold else None,
            "mean_edge_mm": float(s.mean_edge_length)}


def _inspect(ctx: Context) -> dict:
    import surfacekit as sk

    target = ctx.outputs.claim(ctx.args.output, suffixes=(".json",)) if ctx.args.output else None
    s = load_surface(ctx.args.mesh)
    summary = {"input": Path(ctx.args.mesh).name, **surface_facts(s)}
    quality = sk.quality_report(s)
    summary["quality"] = quality.to_dict()
    summary["warnings"] = list(quality.warnings)
    if target is not None:
        _write_json(target, summary)
    for w in summary["warnings"]:
        ctx.say(f"surfacekit: quality warning: {w}")
    return summary


# ---------------------------------------------------------------- prepare
def _prepare_args(p):
    p.add_argument("input", help="label volume (.nii/.nii.gz) or mesh")
    p.add_argument("-o", "--output", required=True, help="output mesh (.ply .obj .stl .off)")
    p.add_argument("--label", type=int, default=1, help="label to mesh in a volume (default 1)")
    p.add_argument("--target-vertices", type=int, default=None,
                   help="resample to about this many vertices (default: keep)")
    p.add_argument("--no-smooth", action="store_true", help="never smooth")


def _prepare(ctx: Context) -> dict:
    import surfacekit as sk
    from surfacekit.prepare import prepare as prepare_surface  # the module shadows sk.prepare

    a = ctx.args
    if a.target_vertices is not None and a.target_vertices < 100:
        raise InputError(f"--target-vertices must be at least 100, got {a.target_vertices}")
    target = ctx.outputs.claim(a.output, suffixes=(".ply", ".obj", ".stl", ".off"))
    src = _existing(a.input)
    with ctx.progress(2, "prepare") as bar:
        if _is_volume(src):
            surface = sk.from_segmentation(src, a.label)
        else:
            surface = load_surface(a.input)
        bar.update()
        prepared, report = prepare_surface(surface, target_vertices=a.target_vertices,
                                      smooth=False if a.no_smooth else None)
        bar.update()
    sk.save(prepared, target)
    return {"input": src.name, "output": str(a.output), "before": surface_facts(surface),
            "after": surface_facts(prepared), "steps": report.to_dict()}


# ---------------------------------------------------------------- describe
def _describe_args(p):
    p.add_argument("mesh", help="surface mesh")
    p.add_argument("-o", "--output", required=True, help="output .npz of per-vertex descriptors")
    p.add_argument("--eigenpairs", type=int, default=100, help="Laplace–Beltrami eigenpairs (default 100)")


def _describe(ctx: Context) -> dict:
    import surfacekit as sk

    a = ctx.args
    if a.eigenpairs < 2:
        raise InputError(f"--eigenpairs must be at least 2, got {a.eigenpairs}")
    target = ctx.outputs.claim(a.output, suffixes=(".npz",))
    s = load_surface(a.mesh)
    if a.eigenpairs >= s.n_vertices:
        raise InputError(f"--eigenpairs {a.eigenpairs} must be below the vertex count {s.n_vertices}")
    arrays = {}
    with ctx.progress(4, "describe") as bar:
        basis = sk.eigenbasis(s, a.eigenpairs)
        arrays["eigenvalues"] = basis.values
        bar.update()
        arrays["hks"] = sk.heat_kernel_signature(s, basis=basis)
        bar.update()
        arrays["wks"] = sk.wave_kernel_signature(s, basis=basis)
        bar.update()
        arrays["mean_curvature"] = sk.mean_curvature(s)
        arrays["gaussian_curvature"] = sk.gaussian_curvature(s)
        bar.update()
    sk.save_fields(target, **arrays)
    return {"input": Path(a.mesh).name, "output": str(a.output),
            "arrays": {k: list(np.shape(v)) for k, v in arrays.items()},
            "first_eigenvalues_per_mm2": [float(x) for x in basis.values[:5]]}


# ---------------------------------------------------------------- match
def _match_args(p):
    p.add_argument("source", help="first surface (e.g. baseline)")
    p.add_argument("target", help="second surface (e.g. follow-up)")
    p.add_argument("-o", "--output", required=True, help="output correspondence .npz")
    p.add_argument("--report", help="also write an HTML report of the map")
    p.add_argument("--pose", choices=("auto", "same", "any"), default="auto",
                   help="same: both scans share orientation; any: arbitrary pose; auto (default) tries both")


def _match_options(pose: str):
    import surfacekit as sk

    return sk.MatchOptions(same_orientation={"auto": None, "same": True, "any": False}[pose])


def without_timings(result):
    """Drop wall-clock timings from a result's ``info`` before it is saved.

    Saved files must be byte-identical for the same inputs and seed; timings
    belong in the printed summary and the report only.
    """
    def strip(value):
        if isinstance(value, dict):
            return {k: strip(v) for k, v in value.items() if "timing" not in str(k).lower()}
        if isinstance(value, list):
            return [strip(v) for v in value]
        return value

    info = getattr(result, "info", None)
    if isinstance(info, dict):
        timings = {k: v for k, v in info.items() if "timing" in str(k).lower()}
        result.info = strip(info)
        return timings
    return {}


def _map_summary(corr) -> dict:
    out = {}
    if getattr(corr, "confidence", None) is not None:
        out["mean_confidence"] = float(np.mean(corr.confidence))
    info = getattr(corr, "info", {}) or {}
    out.update({k: v for k, v in info.items() if k in ("route", "energy", "chosen")})
    return out


def _match(ctx: Context) -> dict:
    import surfacekit as sk

    a = ctx.args
    target_path = ctx.outputs.claim(a.output, suffixes=(".npz",))
    report_path = ctx.outputs.claim(a.report, suffixes=(".html",)) if a.report else None
    src, tgt = load_surface(a.source, "source"), load_surface(a.target, "target")
    t0 = time.perf_counter()
    corr = sk.match(src, tgt, _match_options(a.pose), seed=a.seed)
    seconds = time.perf_counter() - t0
    without_timings(corr)
    corr.save(target_path)
    summary = {"source": Path(a.source).name, "target": Path(a.target).name,
               "output": str(a.output), **_map_summary(corr), "seconds": round(seconds, 2)}
    if report_path is not None:
        from .report import write_report
        from .report_views import correspondence_panel

        names = (Path(a.source).name, Path(a.target).name)
        write_report(report_path, title="surfacekit correspondence report",
                     subtitle=f"{names[0]} → {names[1]}",
                     panels=[correspondence_panel(names[0], src, names[1], tgt, corr)],
                     summary={k: v for k, v in summary.items() if k != "seconds"},
                     provenance={"inputs": [_input_record(Path(a.source), src),
                                            _input_record(Path(a.target), tgt)],
                                 "options": {"pose": a.pose, "seed": a.seed},
                                 "timings (s)": {"match": round(seconds, 2)}})
    return summary


# ---------------------------------------------------------------- change
def _change_args(p):
    p.add_argument("baseline", help="baseline surface")
    p.add_argument("followup", help="follow-up surface")
    p.add_argument("-o", "--output", required=True, help="output folder")
    p.add_argument("--map", help="correspondence .npz from 'surfacekit match' (default: match now)")
    p.add_argument("--regions", help="labelled template mesh whose per-vertex 'region' field "
                                     "is transferred to the baseline for a regional table")
    p.add_argument("--region-field", default="region", help="name of the template's label field")
    p.add_argument("--pose", choices=("auto", "same", "any"), default="auto", help="as for 'match'")
    p.add_argument("--no-report", action="store_true", help="skip the HTML report and figures")


def load_regions(path: str, field: str):
    """A template surface and its integer per-vertex region labels."""
    import surfacekit as sk

    p = _existing(path, "region template")
    template, fields = sk.io.load_with_fields(p)
    if field not in fields:
        raise InputError(f"{p.name} has no per-vertex field {field!r} (fields: "
                         f"{', '.join(sorted(fields)) or 'none'})")
    labels = np.asarray(fields[field])
    if labels.shape != (template.n_vertices,) or not np.allclose(labels, np.round(labels)):
        raise InputError(f"field {field!r} of {p.name} is not one integer label per vertex")
    return template, labels.astype(np.int64)


def _change(ctx: Context) -> dict:
    import surfacekit as sk

    from .report import write_report
    from .report_views import change_figures, change_panel

    a = ctx.args
    out = ctx.outputs.claim(a.output, directory=True)
    base, follow = load_surface(a.baseline, "baseline"), load_surface(a.followup, "follow-up")
    corr = None
    if a.map:
        corr = sk.Correspondence.load(_existing(a.map, "map"))
        if len(corr.source_to_target) != base.n_vertices or len(corr.target_to_source) != follow.n_vertices:
            raise InputError(f"map {Path(a.map).name} does not fit these surfaces "
                             "(vertex counts differ)")
    regions = load_regions(a.regions, a.region_field) if a.regions else None
    timings, t0 = {}, time.perf_counter()
    with ctx.progress(4, "change") as bar:
        if corr is None:
            corr = sk.match(base, follow, _match_options(a.pose), seed=a.seed)
        timings["match"] = time.perf_counter() - t0
        bar.update()
        labels = None
        if regions is not None:
            labels, _ = sk.transfer_labels(regions[0], regions[1], base)
        rep = sk.measure_change(base, follow, corr, labels=labels, seed=a.seed)
        timings["change"] = time.perf_counter() - t0 - timings["match"]
        bar.update()
        without_timings(rep)
        without_timings(corr)
        rep.to_csv(out / "change.csv")
        rep.save(out / "change.npz")
        corr.save(out / "map.npz")
        sk.save(base, out / "baseline_change.ply", fields=rep.fields())
        regional = None
        if labels is not None:
            regional = rep.regional_table(labels)
            write_rows_csv(out / "regions.csv", regional)
        bar.update()
        if not a.no_report:
            names = (Path(a.baseline).name, Path(a.followup).name)
            summary = rep.summary()
            figs = change_figures(base, rep, regional, corr)
            write_report(out / "report.html", title="surfacekit change report",
                         subtitle=f"{names[0]} → {names[1]}",
                         panels=[change_panel(names[0], base, names[1], follow, corr, rep, labels)],
                         summary=summary, tables={"Regions": regional} if regional else None,
                         figures=figs, figure_dir=out / "figures",
                         provenance={"inputs": [_input_record(Path(a.baseline), base),
                                                _input_record(Path(a.followup), follow)],
                                     "options": {"pose": a.pose, "seed": a.seed,
                                                 "map": a.map or "", "regions": a.regions or ""},
                                     "timings (s)": {k: round(v, 2) for k, v in timings.items()}})
        bar.update()
    return {"baseline": Path(a.baseline).name, "followup": Path(a.followup).name,
            "output": str(a.output), **rep.summary(), **_map_summary(corr)}


def write_rows_csv(path: Path, rows: list[dict]) -> None:
    """Rows (dicts) to CSV with a stable column order and fixed float formatting."""
    columns: list[str] = []
    for r in rows:
        columns += [c for c in r if c not in columns]
    with open(path, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=columns, lineterminator="\n")
        w.writeheader()
        for r in rows:
            w.writerow({k: (f"{v:.6g}" if isinstance(v, (float, np.floating)) else v)
                        for k, v in r.items()})


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
    manifest = _existing(a.manifest, "manifest")
    check_manifest(manifest)
    if a.template:
        _existing(a.template, "template")
    out = ctx.outputs.claim(a.output, directory=True)
    result = sk.run_cohort(manifest, out, a.template, workers=a.workers,
                           target_vertices=a.target_vertices, n_permutations=a.permutations,
                           seed=a.seed, progress=not ctx.quiet and sys.stderr.isatty())
    if result.n_failed == result.n_subjects:
        raise InputError(f"every subject failed; first: {result.failed[0][0]}: {result.failed[0][1]}")
    ctx.say(result.summary())
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


COMMANDS = [
    Command("inspect", "mesh quality check", "Check a mesh: size, area, volume, topology, defects.",
            f"surfacekit inspect {D}/kidney_followup.ply --json", _inspect_args, _inspect),
    Command("prepare", "clean mesh from a segmentation or mesh",
            "Repair, smooth and resample a mesh, or mesh one label of a NIfTI segmentation.",
            f"surfacekit prepare {D}/kidney_followup_seg.nii.gz --label 1 --target-vertices 4000 "
            "-o followup_clean.ply", _prepare_args, _prepare),
    Command("describe", "intrinsic descriptors",
            "Laplace–Beltrami spectrum, heat and wave kernel signatures, curvature (.npz).",
            f"surfacekit describe {D}/kidney_baseline.ply -o baseline_descriptors.npz",
            _describe_args, _describe),
    Command("match", "dense correspondence between two surfaces",
            "Vertex-to-vertex map between two surfaces of the same organ (.npz).",
            f"surfacekit match {D}/kidney_baseline.ply {D}/kidney_followup.ply -o map.npz "
            "--report map.html", _match_args, _match),
    Command("change", "change between baseline and follow-up",
            "Displacement, area and volume change, regional table and report.",
            f"surfacekit change {D}/kidney_baseline.ply {D}/kidney_followup.ply "
            f"--regions {D}/kidney_template.ply -o change_out", _change_args, _change),
    Command("cohort", "cohort run from a manifest",
            "Prepare, match to the template and compare groups for every subject of a manifest.",
            f"surfacekit cohort {D}/demo_cohort.csv -o cohort_out", _cohort_args, _cohort),
    Command("demo", "run the synthetic demo end to end",
            "Generate an invented, synthetic kidney follow-up study and run the whole job on it.",
            "surfacekit demo -o surfacekit-demo", _demo_args, _demo),
]
