"""``surfacekit demo``: the whole job, end to end, on an invented synthetic study.

Writes into one folder::

    data/        the scenario's inputs (see :mod:`surfacekit.demo_data`), incl. demo_cohort.csv
    results/     quality.json, followup_from_segmentation.ply, baseline_descriptors.npz,
                 map.npz, change.csv, regions.csv, change.npz, baseline_change.ply,
                 map_quality.json, cohort/ (cohort tables)
    figures/     PNG figures for print
    report.html  the self-contained interactive report

All data are synthetic and invented; results are for research use only.
"""
from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path

import numpy as np

from . import demo_data
from .report import ReportPanel, write_report


def _timed(timings: dict, name: str, fn, *args, **kwargs):
    t0 = time.perf_counter()
    out = fn(*args, **kwargs)
    timings[name] = round(time.perf_counter() - t0, 2)
    return out


def _json(path: Path, data: dict) -> None:
    from .cli import _json_default

    path.write_text(json.dumps(data, indent=2, sort_keys=True, default=_json_default) + "\n")


def _ground_truth(base_sphere: np.ndarray, follow_sphere: np.ndarray) -> np.ndarray:
    """True baseline vertex of each follow-up vertex: the nearest sphere parameter."""
    from scipy.spatial import cKDTree

    return cKDTree(base_sphere).query(follow_sphere)[1].astype(np.int64)


def _scalars(d: dict) -> dict:
    return {k: v for k, v in d.items() if isinstance(v, (int, float, str, bool, np.number))}


def _cohort_panel(result_dir: Path, raw_template, raw_labels):
    """Group-test maps on the cohort's prepared template, with the template's regions."""
    import csv

    from scipy.spatial import cKDTree

    from .views import group_test_panel
    from ..mesh.surface import Surface

    gt = result_dir / "group_test.csv"
    tfile = result_dir / "template" / "template.npz"
    if not (gt.is_file() and tfile.is_file()):
        return None, []
    with np.load(tfile, allow_pickle=False) as data:
        template = Surface(data["vertices"], data["faces"])
    with open(gt, newline="") as fh:
        rows = list(csv.DictReader(fh))
    cols = {k: np.array([float(r[k]) for r in rows]) for k in rows[0] if k != "vertex"}
    means = [k for k in cols if k.startswith("mean_")]

    class _Result:  # the columns of group_test.csv under the GroupTestResult names
        t, p_fwer, q_fdr = cols["t"], cols.get("p_fwer"), cols.get("q_fdr")

    labels = raw_labels[cKDTree(raw_template.vertices).query(template.vertices)[1]]
    diff = cols[means[1]] - cols[means[0]] if len(means) == 2 else None
    groups = tuple(m[len("mean_"):-len("_mm")] for m in means) if len(means) == 2 else ("A", "B")
    panel = group_test_panel("cohort template", template, _Result, diff, labels,
                             demo_data.REGION_NAMES, groups=groups)
    t_shown = -cols["t"]  # second group minus first, as in the panel
    table = []
    for lab, name in demo_data.REGION_NAMES.items():
        m = labels == lab
        table.append({"region": name, "vertices": int(m.sum()),
                      "mean difference (mm)": float(diff[m].mean()) if diff is not None else None,
                      f"max t ({groups[1]} − {groups[0]})": float(t_shown[m].max()),
                      "min p (FWER)": float(cols["p_fwer"][m].min()) if "p_fwer" in cols else None,
                      "vertices with p_FWER < 0.05": int((cols["p_fwer"][m] < 0.05).sum())
                      if "p_fwer" in cols else None})
    return panel, table


def run_demo(out, *, size: str = "full", seed: int = 0, quiet: bool = False,
             display_root: Path | None = None, workers: int | None = None) -> dict:
    """Generate the synthetic study into `out` and run every stage on it; returns a summary."""
    import surfacekit as sk

    from . import figures as rfig
    from .cli_util import input_record, surface_facts, without_timings, write_rows_csv
    from ..preparation import prepare as prepare_surface
    from .views import change_figures, change_panel, correspondence_panel

    out = Path(out)
    data, res, figdir = out / "data", out / "results", out / "figures"
    for d in (data, res, figdir):
        d.mkdir(parents=True, exist_ok=True)
    timings: dict[str, float] = {}
    from tqdm.auto import tqdm

    # one bar step per stage; silent with --quiet or when stderr is not a terminal
    bar = tqdm(total=7, desc="demo", unit="stage", leave=False,
               disable=quiet or not sys.stderr.isatty())

    started = []

    def say(message: str) -> None:  # a new stage starts: the previous one is done
        if started:
            bar.update()
        started.append(message)
        if not quiet:
            tqdm.write(f"demo: {message}", file=sys.stderr)

    say(f"writing the synthetic scenario ({size}) to {display_root or out}/data")
    scen = _timed(timings, "generate scenario", demo_data.write_scenario, data, size, seed)
    p, truth, sizes = scen["paths"], scen["truth"], scen["sizes"]

    base = sk.load(p["baseline"])
    follow_mesh = sk.load(p["followup"])
    quality = {"baseline": {**surface_facts(base), **sk.quality_report(base).to_dict()},
               "followup mesh": {**surface_facts(follow_mesh),
                                 **sk.quality_report(follow_mesh).to_dict()}}

    say("preparing the follow-up from its label volume (staircase artefacts, anisotropic voxels)")
    raw = _timed(timings, "mesh segmentation", sk.from_segmentation, p["followup_seg"], 1)
    follow, prep_report = _timed(timings, "prepare", prepare_surface, raw,
                                 target_vertices=sizes.followup)
    quality["followup from segmentation (raw)"] = surface_facts(raw)
    quality["followup from segmentation (prepared)"] = surface_facts(follow)
    sk.save(follow, res / "followup_from_segmentation.ply")
    _json(res / "quality.json", {"surfaces": quality, "prepare": prep_report.to_dict()})

    say("descriptors of the baseline (Laplace-Beltrami basis, HKS, WKS)")
    basis = _timed(timings, "eigenbasis", sk.eigenbasis, base, 60)
    sk.save_fields(res / "baseline_descriptors.npz", eigenvalues=basis.values,
                   hks=sk.heat_kernel_signature(base, basis=basis),
                   wks=sk.wave_kernel_signature(base, basis=basis))

    say("matching baseline -> follow-up mesh (ground truth known) and -> segmentation follow-up")
    corr_mesh = _timed(timings, "match (mesh follow-up)", sk.match, base, follow_mesh, seed=seed)
    gt = _ground_truth(truth["baseline_sphere"], truth["followup_sphere"])
    mq = sk.map_quality(base, follow_mesh, corr_mesh, ground_truth=gt, seed=seed)
    _json(res / "map_quality.json", mq)
    corr = _timed(timings, "match (segmentation follow-up)", sk.match, base, follow, seed=seed)
    without_timings(corr)
    corr.save(res / "map.npz")

    say("regions from the template, change maps and regional table")
    template, tfields = sk.io.load_with_fields(p["template"])
    t_labels = np.asarray(tfields["region"]).astype(np.int64)
    labels, _conf = _timed(timings, "label transfer", sk.transfer_labels, template, t_labels, base,
                           seed=seed)
    change = _timed(timings, "change", sk.measure_change, base, follow, corr, labels=labels,
                    names=demo_data.REGION_NAMES, seed=seed)
    without_timings(change)
    change.to_csv(res / "change.csv")
    change.save(res / "change.npz")
    regional = change.regional_table(labels, demo_data.REGION_NAMES)
    write_rows_csv(res / "regions.csv", regional)
    sk.save(base, res / "baseline_change.ply", fields=change.fields())

    say(f"cohort of {sizes.n_subjects} subjects from data/demo_cohort.csv")
    n_workers = workers or max(1, min(2, os.cpu_count() or 1))
    cohort = _timed(timings, "cohort", sk.run_cohort, p["manifest"], res / "cohort",
                    workers=n_workers, target_vertices=sizes.cohort, n_permutations=2000,
                    seed=seed, progress=not quiet and sys.stderr.isatty())
    cohort_panel, cohort_table = _cohort_panel(res / "cohort", template, t_labels)

    say("writing the report and figures")
    names = ("baseline (scanner A)", "follow-up (scanner B, from segmentation)")
    summary = {
        "scenario": "synthetic kidney follow-up study (invented data)",
        "true volume change (ml, built into the scenario)": truth["true_volume_change_ml"],
        "measured volume change (ml)": change.volume_change_ml,
        "true peak growth (mm)": truth["growth_mm"],
        "measured max normal displacement (mm)": float(np.max(change.normal_displacement)),
        "map error vs ground truth, mean (geodesic / sqrt(area))":
            mq.get("geodesic_error_mean", mq.get("mean_geodesic_error")),
        "map mean confidence": float(np.mean(corr.confidence)) if corr.confidence is not None else None,
        "cohort subjects (failed)": f"{cohort.n_subjects} ({cohort.n_failed})",
    }
    if cohort_table:
        top = max(cohort_table, key=lambda r: r["vertices with p_FWER < 0.05"] or 0)
        summary["cohort: region with most vertices at p_FWER < 0.05 (growth vs control)"] = (
            f"{top['region']} ({top['vertices with p_FWER < 0.05']} of {top['vertices']})")
    figures = change_figures(base, change, regional, corr)
    figures["Template regions"] = rfig.surface_figure(template, t_labels, title="region",
                                                      kind="labels")
    panels: list[ReportPanel] = [
        change_panel(names[0], base, names[1], follow, corr, change, labels, demo_data.REGION_NAMES),
        correspondence_panel("baseline", base, "follow-up mesh (scanner B)", follow_mesh, corr_mesh),
    ]
    tables = {"Regional change (baseline regions from the template)": regional,
              "Map quality against the known ground truth (baseline → follow-up mesh)":
                  [_scalars(mq)],
              "Surfaces": [{"surface": k, **_scalars(v)} for k, v in quality.items()]}
    if cohort_panel is not None:
        panels.append(cohort_panel)
        tables["Cohort: growth vs control, vertex-wise permutation test by region"] = cohort_table
    tables["Cohort subjects"] = [{k: r.get(k) for k in ("subject", "status", "error")}
                                 for r in cohort.rows]
    provenance = {
        "inputs": [{"role": k, **input_record(Path(v)), "path": str(Path(v).relative_to(out))}
                   for k, v in p.items()],
        "options": {"size": size, "seed": seed, "workers": n_workers,
                    "cohort target vertices": sizes.cohort, "permutations": 2000},
        "timings (s)": timings,
        "note": "All data are synthetic and invented for this demo; no person's data.",
    }
    write_report(out / "report.html", title="surfacekit demo: synthetic kidney follow-up study",
                 subtitle="Invented, synthetic data. " + " ".join(
                     (data / "SCENARIO.txt").read_text().split("\n\n")[1:2]).replace("\n", " "),
                 panels=panels, summary=summary, tables=tables, figures=figures,
                 figure_dir=figdir, provenance=provenance)
    for fig in figures.values():
        rfig.close(fig)
    bar.update()
    bar.close()
    return {"output": str(display_root or out), "report": "report.html",
            "figures": sorted(f.name for f in figdir.glob("*.png")),
            "manifest": "data/demo_cohort.csv", **{k: v for k, v in summary.items()},
            "seconds": timings}
