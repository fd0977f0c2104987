"""The demo's report: headline comparison with the scenario's built-in truth, 3D panels,
tables and figures (the HTML assembly itself is :func:`surfacekit.app.report.write_report`)."""
from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from ..mesh.surface import Surface
from . import demo_data
from . import figures as rfig
from .report import ReportPanel, write_report
from .views import (
    change_figures,
    change_panel,
    correspondence_panel,
    group_test_panel,
    map_trust,
    trust_report_parts,
)


def _scalars(d: dict) -> dict:
    return {k: v for k, v in d.items() if isinstance(v, (int, float, str, bool, np.number))}


class _GroupColumns:
    """The columns of group_test.csv under the names of ``GroupTestResult``
    (``t`` = the file's ``t_<second>_minus_<first>``)."""

    def __init__(self, cols: dict, t_column: str):
        self.t, self.p_fwer, self.q_fdr = cols[t_column], cols.get("p_fwer"), cols.get("q_fdr")


def _region_rows(cols: _GroupColumns, labels: np.ndarray, diff, groups: tuple[str, str]
                 ) -> list[dict]:
    """Per template region: size, mean difference, largest t (``groups[0] - groups[1]``, as in
    group_test.csv and the panel) and the FWER hits."""
    p_fwer = cols.p_fwer
    table = []
    for lab, name in demo_data.REGION_NAMES.items():
        m = labels == lab
        table.append({"region": name, "vertices": int(m.sum()),
                      f"mean difference ({groups[0]} − {groups[1]}, mm)":
                          float(diff[m].mean()) if diff is not None else None,
                      f"max t ({groups[0]} − {groups[1]})": float(cols.t[m].max()),
                      "min p (FWER)": float(p_fwer[m].min()) if p_fwer is not None else None,
                      "vertices with p_FWER < 0.05": int((p_fwer[m] < 0.05).sum())
                      if p_fwer is not None else None})
    return table


def cohort_panel(result_dir: Path, raw_template: Surface, raw_labels: np.ndarray):
    """Group-test maps on the cohort's prepared template, with the template's regions.

    Returns ``(panel, table)``, or ``(None, [])`` when the cohort wrote no group test.
    """
    from scipy.spatial import cKDTree

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
    labels = raw_labels[cKDTree(raw_template.vertices).query(template.vertices)[1]]
    first, second = (m[len("mean_"):-len("_outward_mm")] for m in means)  # manifest order
    diff = cols[means[1]] - cols[means[0]]
    result = _GroupColumns(cols, f"t_{second}_minus_{first}")
    panel = group_test_panel("cohort template", template, result, diff, labels,
                             demo_data.REGION_NAMES, groups=(second, first))
    return panel, _region_rows(result, labels, diff, (second, first))


def _group_provenance(cohort) -> dict:
    """The cohort group test's contrast and covariates (used, and dropped with the reason)."""
    info = getattr(cohort, "group_test", None) or {}
    if not info:
        return {}
    dropped = "; ".join(f"{d['name']}: {d['reason']}" for d in info["covariates_dropped"])
    return {"group test": {"t column": info["t_column"], "contrast": info["contrast"],
                           "covariates used": ", ".join(info["covariates_used"]) or "none",
                           "covariates dropped": dropped or "none"}}


def _headline(result, truth: dict, mq: dict, cohort, cohort_table: list[dict]) -> dict:
    """The demo's results beside the truth built into the scenario."""
    change, corr = result.change, result.correspondence
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
    return summary


def write_demo_report(out: Path, *, base, follow, follow_mesh, result, corr_mesh, map_quality,
                      truth, quality, cohort, cohort_view, template, provenance) -> dict:
    """Write ``report.html`` and the figures of the demo; returns the headline summary."""
    panel, cohort_table = cohort_view
    change, corr = result.change, result.correspondence
    summary = _headline(result, truth, map_quality, cohort, cohort_table)
    regional = change.regional_table()
    figures = change_figures(base, change, regional, corr)
    figures["Template regions"] = rfig.surface_figure(template[0], template[1], title="region",
                                                      kind="labels",
                                                      label_names=demo_data.REGION_NAMES)
    names = ("baseline (scanner A)", "follow-up (scanner B, from segmentation)")
    panels: list[ReportPanel] = [
        change_panel(names[0], base, names[1], follow, corr, change, result.labels,
                     demo_data.REGION_NAMES),
        correspondence_panel("baseline", base, "follow-up mesh (scanner B)", follow_mesh, corr_mesh),
    ]
    trust_summary, trust_table = trust_report_parts(map_trust(corr_mesh, base, follow_mesh))
    summary.update({f"{k} (baseline → follow-up mesh)": v for k, v in trust_summary.items()})
    tables = {"Regional change (baseline regions from the template)": regional,
              "Map quality against the known ground truth (baseline → follow-up mesh)":
                  [_scalars(map_quality)],
              **{f"{k} (baseline → follow-up mesh)": v for k, v in trust_table.items()},
              "Surfaces": [{"surface": k, **_scalars(v)} for k, v in quality.items()]}
    if panel is not None:
        panels.append(panel)
        tables["Cohort: growth vs control, vertex-wise permutation test by region"] = cohort_table
    tables["Cohort subjects"] = [{k: r.get(k) for k in ("subject", "status", "error")}
                                 for r in cohort.rows]
    scenario = (out / "data" / "SCENARIO.txt").read_text()
    write_report(out / "report.html", title="surfacekit demo: synthetic kidney follow-up study",
                 subtitle="Invented, synthetic data. " + " ".join(
                     scenario.split("\n\n")[1:2]).replace("\n", " "),
                 panels=panels, summary=summary, tables=tables, figures=figures,
                 figure_dir=out / "figures", warnings=result.warnings,
                 provenance={**provenance, **_group_provenance(cohort)})
    for fig in figures.values():
        rfig.close(fig)
    return summary
