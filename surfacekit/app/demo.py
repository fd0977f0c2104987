"""``surfacekit demo``: the whole job, end to end, on an invented synthetic study.

Writes into one folder::

    data/        the scenario's inputs (see :mod:`surfacekit.app.demo_data`), incl. demo_cohort.csv
    results/     quality.json, followup_from_segmentation.ply, baseline_descriptors.npz,
                 map.npz, change.csv (the regional table), change.npz, baseline_change.ply,
                 map_quality.json, cohort/ (cohort tables)
    figures/     PNG figures for print
    report.html  the self-contained interactive report

All data are synthetic and invented; results are for research use only.
"""
from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import numpy as np
from tqdm.auto import tqdm

from ..analysis.workflow import compare
from ..cohort import run_cohort
from ..correspondence import map_quality, match
from ..io import load, load_with_fields, save, save_fields
from ..io.tables import write_json
from ..mesh.descriptors import heat_kernel_signature, wave_kernel_signature
from ..mesh.eigen import eigenbasis
from ..preparation import from_segmentation, prepare, quality_report
from . import demo_data
from .cli_util import input_record, surface_facts, without_timings
from .demo_report import cohort_panel, write_demo_report


def _timed(timings: dict, name: str, fn, *args, **kwargs):
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    timings[name] = round(time.perf_counter() - t0, 2)
    return out


def _ground_truth(base_sphere: np.ndarray, follow_sphere: np.ndarray) -> np.ndarray:
    """True baseline vertex of each follow-up vertex: the nearest sphere parameter."""
    from scipy.spatial import cKDTree

    return cKDTree(base_sphere).query(follow_sphere)[1].astype(np.int64)


class _Stages:
    """One progress-bar step and one message per stage; silent with --quiet or off a terminal."""

    def __init__(self, total: int, quiet: bool):
        self.quiet = quiet
        self.bar = tqdm(total=total, desc="demo", unit="stage", leave=False,
                        disable=quiet or not sys.stderr.isatty())
        self.started = 0

    def say(self, message: str) -> None:  # a new stage starts: the previous one is done
        if self.started:
            self.bar.update()
        self.started += 1
        if not self.quiet:
            tqdm.write(f"demo: {message}", file=sys.stderr)

    def close(self) -> None:
        self.bar.update()
        self.bar.close()


def _prepare_stage(p: dict, sizes, res: Path, timings: dict):
    """The baseline, the follow-up mesh, and the follow-up prepared from its label volume."""
    base, follow_mesh = load(p["baseline"]), load(p["followup"])
    quality = {"baseline": {**surface_facts(base), **quality_report(base).to_dict()},
               "followup mesh": {**surface_facts(follow_mesh),
                                 **quality_report(follow_mesh).to_dict()}}
    raw = _timed(timings, "mesh segmentation", from_segmentation, p["followup_seg"], 1)
    follow, prep_report = _timed(timings, "prepare", prepare, raw, target_vertices=sizes.followup)
    quality["followup from segmentation (raw)"] = surface_facts(raw)
    quality["followup from segmentation (prepared)"] = surface_facts(follow)
    save(follow, res / "followup_from_segmentation.ply")
    write_json(res / "quality.json", {"surfaces": quality, "prepare": prep_report.to_dict()})
    return base, follow_mesh, follow, quality


def _descriptor_stage(base, res: Path, timings: dict) -> None:
    basis = _timed(timings, "eigenbasis", eigenbasis, base, 60)
    save_fields(res / "baseline_descriptors.npz", eigenvalues=basis.values,
                hks=heat_kernel_signature(base, basis=basis),
                wks=wave_kernel_signature(base, basis=basis))


def _map_quality_stage(base, follow_mesh, truth: dict, res: Path, seed: int, timings: dict):
    """The map to the clean follow-up mesh, scored against the scenario's known correspondence."""
    corr_mesh = _timed(timings, "match (mesh follow-up)", match, base, follow_mesh, seed=seed)
    gt = _ground_truth(truth["baseline_sphere"], truth["followup_sphere"])
    mq = map_quality(base, follow_mesh, corr_mesh, ground_truth=gt, seed=seed)
    write_json(res / "map_quality.json", mq)
    return corr_mesh, mq


def _compare_stage(base, follow, template, t_labels, res: Path, seed: int, timings: dict):
    """Baseline -> prepared follow-up: one match, the template's regions (one match), the change."""
    steps: dict[str, float] = {}
    result = compare(base, follow, seed=seed, template=template, template_labels=t_labels,
                     region_names=demo_data.REGION_NAMES, timings=steps)
    timings.update({"match (segmentation follow-up)": round(steps["match"], 2),
                    "label transfer": round(steps["labels"], 2),
                    "change": round(steps["change"], 2)})
    without_timings(result.correspondence)
    without_timings(result.change)
    result.correspondence.save(res / "map.npz")
    result.change.to_csv(res / "change.csv")
    result.change.save(res / "change.npz")
    save(base, res / "baseline_change.ply", fields=result.change.fields())
    return result


def run_demo(out, *, size: str = "full", seed: int = 0, quiet: bool = False,
             display_root: Path | None = None, workers: int | None = None) -> dict:
    """Generate the synthetic study into `out` and run every stage on it; returns a summary."""
    out = Path(out)
    data, res, figdir = out / "data", out / "results", out / "figures"
    for d in (data, res, figdir):
        d.mkdir(parents=True, exist_ok=True)
    timings: dict[str, float] = {}
    stages = _Stages(7, quiet)
    stages.say(f"writing the synthetic scenario ({size}) to {display_root or out}/data")
    scen = _timed(timings, "generate scenario", demo_data.write_scenario, data, size, seed)
    p, truth, sizes = scen["paths"], scen["truth"], scen["sizes"]
    stages.say("preparing the follow-up from its label volume (staircase artefacts, anisotropic voxels)")
    base, follow_mesh, follow, quality = _prepare_stage(p, sizes, res, timings)
    stages.say("descriptors of the baseline (Laplace-Beltrami basis, HKS, WKS)")
    _descriptor_stage(base, res, timings)
    stages.say("matching baseline -> follow-up mesh (ground truth known)")
    corr_mesh, mq = _map_quality_stage(base, follow_mesh, truth, res, seed, timings)
    stages.say("baseline -> segmentation follow-up: map, regions from the template, change")
    template, tfields = load_with_fields(p["template"])
    t_labels = np.asarray(tfields["region"]).astype(np.int64)
    result = _compare_stage(base, follow, template, t_labels, res, seed, timings)
    stages.say(f"cohort of {sizes.n_subjects} subjects from data/demo_cohort.csv")
    n_workers = workers or max(1, min(2, os.cpu_count() or 1))
    cohort = _timed(timings, "cohort", run_cohort, p["manifest"], res / "cohort",
                    workers=n_workers, target_vertices=sizes.cohort, n_permutations=2000,
                    seed=seed, progress=not quiet and sys.stderr.isatty())
    stages.say("writing the report and figures")
    panel, table = cohort_panel(res / "cohort", template, t_labels)
    summary = write_demo_report(
        out, base=base, follow=follow, follow_mesh=follow_mesh, result=result,
        corr_mesh=corr_mesh, map_quality=mq, truth=truth, quality=quality, cohort=cohort,
        cohort_view=(panel, table), template=(template, t_labels),
        provenance={"inputs": [{"role": k, **input_record(Path(v)),
                                "path": str(Path(v).relative_to(out))} for k, v in p.items()],
                    "options": {"size": size, "seed": seed, "workers": n_workers,
                                "cohort target vertices": sizes.cohort, "permutations": 2000},
                    "timings (s)": timings,
                    "note": "All data are synthetic and invented for this demo; no person's data."})
    stages.close()
    return {"output": str(display_root or out), "report": "report.html",
            "figures": sorted(f.name for f in figdir.glob("*.png")),
            "manifest": "data/demo_cohort.csv", **summary, "seconds": timings}

