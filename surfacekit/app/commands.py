"""Subcommands of the ``surfacekit`` command: one per stage of the job.

Each command reads its inputs (failing fast with a one-line message), calls the
library, and writes its outputs through ``ctx.outputs`` (staged, atomic, never
replacing an existing output without ``--force``).  Examples in ``--help`` use
the files that ``surfacekit demo -o surfacekit-demo`` writes, so they run as shown.
The library is imported inside each command, so ``surfacekit --help`` stays quick.
"""
from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from ..io.tables import write_json
from .batch_commands import COHORT, DEMO
from .cli_util import DEMO_DATA as D
from .cli_util import (
    existing,
    input_record,
    landmark_pairs,
    load_surface,
    region_names_for,
    region_summary,
    surface_facts,
    without_timings,
)
from .context import Command, Context, InputError
from .prepare_command import prepare_args, run_prepare
from .registration_options import add_registration_options, plan_registration, write_registration
from .unit_options import add_units_option, say_warnings, units_for


# ---------------------------------------------------------------- inspect
def _inspect_args(p):
    p.add_argument("mesh", help="surface mesh (.ply .obj .stl .off .gii .vtk .npz)")
    p.add_argument("-o", "--output", help="also write the quality summary to this .json file")
    add_units_option(p)


def _inspect(ctx: Context) -> dict:
    from ..analysis.plausibility import size_warnings
    from ..preparation import quality_report

    units = units_for(ctx.args.units, ["mesh"])[0]
    target = ctx.outputs.claim(ctx.args.output, suffixes=(".json",)) if ctx.args.output else None
    s = load_surface(ctx.args.mesh, units=units)
    summary = {"input": Path(ctx.args.mesh).name, "units": units, **surface_facts(s)}
    quality = quality_report(s)
    summary["quality"] = {k: v for k, v in quality.to_dict().items() if k != "warnings"}
    plausibility = size_warnings(s, Path(ctx.args.mesh).name)
    summary["warnings"] = list(quality.warnings) + plausibility
    if target is not None:
        write_json(target, summary)
    for w in quality.warnings:
        ctx.say(f"surfacekit: quality warning: {w}")
    say_warnings(ctx, plausibility)
    return summary


# ---------------------------------------------------------------- describe
def _describe_args(p):
    p.add_argument("mesh", help="surface mesh")
    p.add_argument("-o", "--output", required=True, help="output .npz of per-vertex descriptors")
    p.add_argument("--eigenpairs", type=int, default=100, help="Laplace–Beltrami eigenpairs (default 100)")
    add_units_option(p)


def _describe(ctx: Context) -> dict:
    from ..analysis.plausibility import size_warnings
    from ..io import save_fields
    from ..mesh.descriptors import (
        gaussian_curvature,
        heat_kernel_signature,
        mean_curvature,
        wave_kernel_signature,
    )
    from ..mesh.eigen import eigenbasis

    a = ctx.args
    if a.eigenpairs < 2:
        raise InputError(f"--eigenpairs must be at least 2, got {a.eigenpairs}")
    units = units_for(a.units, ["mesh"])[0]
    target = ctx.outputs.claim(a.output, suffixes=(".npz",))
    s = load_surface(a.mesh, units=units)
    if a.eigenpairs >= s.n_vertices:
        raise InputError(f"--eigenpairs {a.eigenpairs} must be below the vertex count {s.n_vertices}")
    warnings = size_warnings(s, Path(a.mesh).name)
    say_warnings(ctx, warnings)
    arrays = {}
    with ctx.progress(4, "describe") as bar:
        basis = eigenbasis(s, a.eigenpairs)
        arrays["eigenvalues"] = basis.values
        bar.update()
        arrays["hks"] = heat_kernel_signature(s, basis=basis)
        bar.update()
        arrays["wks"] = wave_kernel_signature(s, basis=basis)
        bar.update()
        arrays["mean_curvature"] = mean_curvature(s)
        arrays["gaussian_curvature"] = gaussian_curvature(s)
        bar.update()
    save_fields(target, **arrays)
    return {"input": Path(a.mesh).name, "output": str(a.output), "units": units,
            "arrays": {k: list(np.shape(v)) for k, v in arrays.items()},
            "first_eigenvalues_per_mm2": [float(x) for x in basis.values[:5]], "warnings": warnings}


# ---------------------------------------------------------------- match
def _match_args(p):
    p.add_argument("source", help="first surface (e.g. baseline)")
    p.add_argument("target", help="second surface (e.g. follow-up)")
    p.add_argument("-o", "--output", required=True, help="output correspondence .npz")
    p.add_argument("--report", help="also write an HTML report of the map")
    p.add_argument("--pose", choices=("auto", "same", "any"), default="auto",
                   help="same: both scans share orientation; any: arbitrary pose; auto (default) tries both")
    p.add_argument("--landmarks", metavar="PAIRS",
                   help="known pairs: CSV with source_vertex,target_vertex columns (or two bare "
                        "integer columns), or points in mm with source_x,source_y,source_z,"
                        "target_x,target_y,target_z columns (snapped to the nearest vertices, so "
                        "they survive resampling), or NPZ as written by the landmark export; 2-3 "
                        "pairs fix near-symmetric organs")
    p.add_argument("--partial", choices=("auto", "yes", "no"), default="auto",
                   help="one scan covers only part of the other (a cropped scan): auto (default) "
                        "when exactly one is open along a flat cut, yes to force, no to forbid")
    add_units_option(p, ("source", "target"))
    add_registration_options(p)


def _match_options(pose: str, landmarks: str | None, source, target, partial: str = "auto"):
    """Match options, and the summary's note on the landmarks (points in mm are snapped)."""
    from ..correspondence import MatchOptions

    pairs, info = landmark_pairs(landmarks, source, target)
    return MatchOptions(same_orientation={"auto": None, "same": True, "any": False}[pose],
                        landmarks=pairs, partial=partial), info


def _map_summary(corr, source=None, target=None) -> dict:
    from .partial_views import partial_summary
    from .views import map_trust

    out = partial_summary(corr)  # a cropped scan: the covered region and its share
    if getattr(corr, "confidence", None) is not None:
        out["mean_confidence"] = float(np.mean(corr.confidence))
    info = getattr(corr, "info", {}) or {}
    out.update({k: v for k, v in info.items() if k in ("route", "energy", "chosen")})
    out.update(map_trust(corr, source, target))  # turn note, coverage, round trip, distortion
    n_lm = len((info.get("options") or {}).get("landmarks") or ())
    if n_lm:
        out["landmark_pairs"] = n_lm
    return out


def _match(ctx: Context) -> dict:
    from ..analysis.plausibility import pair_warnings
    from ..analysis.workflow import main_pieces
    from ..correspondence import solver

    a = ctx.args
    units = units_for(a.units, ("source", "target"))
    target_path = ctx.outputs.claim(a.output, suffixes=(".npz",))
    report_path = ctx.outputs.claim(a.report, suffixes=(".html",)) if a.report else None
    src = load_surface(a.source, "source", units=units[0])
    tgt = load_surface(a.target, "target", units=units[1])
    registration = plan_registration(ctx, tgt)  # --transform/--field checked before matching
    t0 = time.perf_counter()
    options, landmark_info = _match_options(a.pose, a.landmarks, src, tgt, a.partial)
    names = (Path(a.source).name, Path(a.target).name)
    src, tgt, options, pieces = main_pieces(src, tgt, options, names)  # small extra pieces dropped
    corr = solver.match(src, tgt, options, seed=a.seed)
    seconds = time.perf_counter() - t0
    without_timings(corr)
    corr.save(target_path)
    registered = write_registration(registration, corr, src, tgt, a.seed)
    warnings = pieces + pair_warnings(src, tgt, corr.rigid.rms, names)
    say_warnings(ctx, warnings)
    summary = {"source": names[0], "target": names[1], "output": str(a.output),
               "units": {"source": units[0], "target": units[1]}, **_map_summary(corr, src, tgt),
               **landmark_info,
               "alignment_rms_mm": float(corr.rigid.rms), "warnings": warnings,
               "seconds": round(seconds, 2), **registered}
    if report_path is not None:
        from .report import write_report
        from .views import correspondence_panel, trust_report_parts

        trust_summary, trust_table = trust_report_parts(summary)
        write_report(report_path, title="surfacekit correspondence report",
                     subtitle=f"{names[0]} → {names[1]}",
                     panels=[correspondence_panel(names[0], src, names[1], tgt, corr)],
                     summary={k: v for k, v in trust_summary.items()
                              if k not in ("seconds", "warnings")},
                     warnings=warnings, tables=trust_table,
                     provenance={"inputs": [input_record(Path(a.source), src),
                                            input_record(Path(a.target), tgt)],
                                 "options": {"pose": a.pose, "seed": a.seed, "partial": a.partial,
                                             "landmarks": a.landmarks or "none",
                                             "units": ",".join(units)},
                                 **registered,
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
    p.add_argument("--region-names", metavar="CSV",
                   help="names of the template's regions: CSV with columns label,name (default: "
                        "the template's '<template file>.regions.csv' beside it, if present)")
    p.add_argument("--pose", choices=("auto", "same", "any"), default="auto", help="as for 'match'")
    p.add_argument("--landmarks", metavar="PAIRS", help="known pairs (vertex indices or points in mm), as for 'match'")
    p.add_argument("--no-report", action="store_true", help="skip the HTML report and figures")
    p.add_argument("--partial", choices=("auto", "yes", "no"), default="auto",
                   help="one scan covers only part of the other (a cropped scan): auto (default) "
                        "when exactly one is open along a flat cut, yes to force, no to forbid")
    add_units_option(p, ("baseline", "follow-up", "region template"))


def load_regions(path: str, field: str, units="mm"):
    """A template surface (in `units`, scaled to mm) and its integer per-vertex region labels."""
    from ..io import load_with_fields

    p = existing(path, "region template")
    template, fields = load_with_fields(p, units)
    if field not in fields:
        raise InputError(f"{p.name} has no per-vertex field {field!r} (fields: "
                         f"{', '.join(sorted(fields)) or 'none'})")
    labels = np.asarray(fields[field])
    if labels.shape != (template.n_vertices,) or not np.allclose(labels, np.round(labels)):
        raise InputError(f"field {field!r} of {p.name} is not one integer label per vertex")
    return template, labels.astype(np.int64)


def _load_map(path: str, base, follow):
    """A saved baseline -> follow-up correspondence that fits these two surfaces."""
    from ..correspondence import Correspondence

    corr = Correspondence.load(existing(path, "map"))
    if corr.n_source != base.n_vertices or corr.n_target != follow.n_vertices:
        raise InputError(f"map {Path(path).name} does not fit these surfaces "
                         "(vertex counts differ)")
    return corr


def _write_change(out: Path, base, result) -> None:
    """The change files: regional table, change fields, the map and the annotated baseline."""
    from ..io import save

    rep, corr = result.change, result.correspondence
    without_timings(rep)
    without_timings(corr)
    rep.to_csv(out / "change.csv")
    rep.save(out / "change.npz")
    corr.save(out / "map.npz")
    save(base, out / "baseline_change.ply", fields=rep.fields())


def _change_report(out: Path, a, surfaces, result, timings: dict) -> None:
    from .partial_views import partial_summary
    from .report import write_report
    from .views import change_figures, change_panel, map_trust, trust_report_parts

    (base, follow), rep, corr = surfaces, result.change, result.correspondence
    names = (Path(a.baseline).name, Path(a.followup).name)
    regional = rep.regional_table() if result.labels is not None else None
    summary = rep.summary()
    warnings = summary.pop("warnings")
    trust_summary, tables = trust_report_parts(map_trust(corr, base, follow))
    summary.update(trust_summary)  # the turn note and a verdict per map-quality measure
    summary.update(partial_summary(corr))
    tables = {**({"Regions": regional} if regional else {}), **tables}
    write_report(out / "report.html", title="surfacekit change report",
                 subtitle=f"{names[0]} → {names[1]}",
                 panels=[change_panel(names[0], base, names[1], follow, corr, rep, result.labels)],
                 summary=summary, warnings=warnings, tables=tables,
                 figures=change_figures(base, rep, regional, corr), figure_dir=out / "figures",
                 provenance={"inputs": [input_record(Path(a.baseline), base),
                                        input_record(Path(a.followup), follow)],
                             "options": {"pose": a.pose, "seed": a.seed, "partial": a.partial,
                                         "map": a.map or "", "regions": a.regions or "",
                                         "region names": a.region_names or "",
                                         "units": a.units},
                             "timings (s)": {k: round(v, 2) for k, v in timings.items()}})


def _change(ctx: Context) -> dict:
    from ..analysis.workflow import compare, main_pieces

    a = ctx.args
    meshes = ("baseline", "follow-up", "region template")[:3 if a.regions else 2]
    units = units_for(a.units, meshes, optional_last=bool(a.regions))
    a.units = ",".join(units)
    out = ctx.outputs.claim(a.output, directory=True)
    base = load_surface(a.baseline, "baseline", units=units[0])
    follow = load_surface(a.followup, "follow-up", units=units[1])
    if a.map and a.landmarks:
        raise InputError("--landmarks has no effect with --map (the map is already made); give one of them")
    template, template_labels = (load_regions(a.regions, a.region_field, units[2]) if a.regions
                                 else (None, None))
    options, landmark_info = _match_options(a.pose, a.landmarks, base, follow, a.partial)
    base, follow, options, pieces = main_pieces(base, follow, options,
                                                (Path(a.baseline).name, Path(a.followup).name))
    corr = _load_map(a.map, base, follow) if a.map else None
    names, names_from = region_names_for(a.region_names, a.regions, template_labels)
    timings: dict[str, float] = {}
    with ctx.progress(3, "change") as bar:
        # one match per pair of surfaces, all with the user's pose, landmarks and seed
        result = compare(base, follow, options=options, seed=a.seed,
                         correspondence=corr, template=template, template_labels=template_labels,
                         region_names=names, timings=timings)
        result.change.info["warnings"][:0] = pieces
        bar.update()
        _write_change(out, base, result)
        bar.update()
        if not a.no_report:
            _change_report(out, a, (base, follow), result, timings)
        bar.update()
    say_warnings(ctx, result.warnings)
    return {"baseline": Path(a.baseline).name, "followup": Path(a.followup).name,
            "output": str(a.output), "units": dict(zip(meshes, units)), **result.change.summary(),
            **_map_summary(result.correspondence, base, follow), **landmark_info,
            **region_summary(result.change, names_from)}


COMMANDS = [
    Command("inspect", "mesh quality check", "Check a mesh: size, area, volume, topology, defects.",
            f"surfacekit inspect {D}/kidney_followup.ply --json", _inspect_args, _inspect),
    Command("prepare", "clean mesh from a segmentation or mesh",
            "Repair, smooth and resample a mesh, or mesh one label of a NIfTI segmentation.",
            f"surfacekit prepare {D}/kidney_followup_seg.nii.gz --label 1 --target-vertices 4000 "
            "-o followup_clean.ply", prepare_args, run_prepare),
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
    COHORT,
    DEMO,
]
