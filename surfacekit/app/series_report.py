"""The report of a cohort with series of scans: per-subject trajectories and rate maps.

``series_report.html`` beside the cohort tables shows, per subject with a rate, a small
plot of the volume and of the regional mean normal displacement over time (years since
the subject's baseline), the rate maps on the cohort template (the mean over subjects and
each subject's map), and the ``series.csv`` table.  Everything is read from the cohort
folder (the run's stored results), so the report can be written again without
recomputing.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np

from ..cohort.series_regions import region_trajectories, template_regions
from ..cohort.store import open_field_store
from ..mesh.surface import Surface
from .panels import ReportLayer, ReportPanel
from .report import write_report

#: subjects drawn as trajectory plots and rate maps; the rest are in series.csv
MAX_SUBJECTS_SHOWN = 12
_RATE = "normal_displacement_outward_rate_mm_per_year"
_DISPLACEMENT = "mean_normal_displacement_outward_mm"


def _pyplot():
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


def trajectory_figure(subject: str, times, volumes_ml, displacement: dict):
    """Two small plots of one subject's series against years since its baseline: the
    enclosed volume (ml) and the area-weighted mean normal displacement (mm, + outward;
    the baseline at 0) of each region in `displacement` ({name: values per scan}).
    Returns a matplotlib Figure."""
    plt = _pyplot()
    fig, (left, right) = plt.subplots(1, 2, figsize=(7.2, 2.7))
    left.plot(times, [np.nan if v is None else v for v in volumes_ml], "o-", color="#3b8c8c")
    left.set_xlabel("years since baseline")
    left.set_ylabel("volume (ml)")
    left.set_title("volume", fontsize=10)
    for name, values in displacement.items():
        right.plot(times, [np.nan if v is None else v for v in values], "o-", label=name)
    right.axhline(0.0, color="#1f2a33", lw=0.8)
    right.set_xlabel("years since baseline")
    right.set_ylabel("mean normal displacement,\n+ outward (mm)")
    whole = list(displacement) == ["all"]
    right.set_title("mean displacement (whole surface)" if whole else
                    "mean displacement per template region", fontsize=10)
    if not whole:
        right.legend(fontsize=8, frameon=False)
    fig.suptitle(f"subject {subject}", fontsize=11)
    fig.tight_layout()
    return fig


def _trajectory(out: Path, subject: str, regions):
    """Times, volumes and the regional mean displacement of one subject's stored series
    (on the template regions when the template has them)."""
    stored = json.loads((out / "subjects" / subject / "series" / "series.json").read_text())
    steps = stored["values"]["trajectories"]
    times = [s["time_years"] for s in steps]
    volumes = [s["volume_ml"] for s in steps]
    if regions is not None:
        return times, volumes, region_trajectories(out / "subjects" / subject, regions)[1]
    return times, volumes, {name: [s["regions"][name].get(_DISPLACEMENT) for s in steps]
                            for name in steps[0]["regions"]}


def _series_rows(out: Path) -> list[dict]:
    with open(out / "series.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def rate_panel(out: Path, subjects: list[str]) -> ReportPanel | None:
    """Normal displacement rate maps on the cohort template: the mean over the subjects with
    a rate, then each of `subjects` (None when no subject has a rate on the template)."""
    store_path, tfile = out / "series_fields.zarr", out / "template" / "template.npz"
    if not (store_path.is_dir() and tfile.is_file()):
        return None
    store = open_field_store(store_path)
    ok = store.written(_RATE)
    if not ok.any():
        return None
    with np.load(tfile, allow_pickle=False) as data:
        template = Surface(data["vertices"], data["faces"])
    rates = np.asarray(store.dask(_RATE, ok).compute())
    names = [s for s, good in zip(store.subjects, ok) if good]
    text = "Normal displacement rate (mm/year): red where the surface moves outward over time."
    layers = [ReportLayer(f"mean rate over {len(names)} subjects", [np.nanmean(rates, axis=0)],
                          kind="diverging", unit="mm/year", description=text)]
    layers += [ReportLayer(f"rate of {name}", [rates[names.index(name)]], kind="diverging",
                           unit="mm/year", description=text)
               for name in subjects if name in names]
    return ReportPanel("Rates on the cohort template", [("cohort template", template)], layers)


def write_series_report(out, template_entry=None, *,
                        title: str = "surfacekit cohort: series of scans") -> Path | None:
    """Write ``series_report.html`` (and its figures under ``series_figures/``) from a
    finished cohort folder with ``series.csv``; None when the folder has none.
    `template_entry` (the manifest's template row) gives the template regions, if any."""
    out = Path(out)
    if not (out / "series.csv").is_file():
        return None
    rows = _series_rows(out)
    shown = [r["subject"] for r in rows if r["status"] == "ok"][:MAX_SUBJECTS_SHOWN]
    regions = template_regions(template_entry, out) if template_entry is not None else None
    figures = {f"Trajectory of subject {subject}":
               trajectory_figure(subject, *_trajectory(out, subject, regions))
               for subject in shown}
    counts = {k: sum(r["status"] == k for r in rows) for k in ("ok", "no_rate", "failed")}
    summary = {"subjects": len(rows), "subjects with a rate": counts["ok"],
               "subjects without a rate (fewer than two dated scans)": counts["no_rate"],
               "subjects whose series failed": counts["failed"],
               "trajectories and rate maps shown": f"{len(shown)} (all subjects are in series.csv)"}
    panel = rate_panel(out, shown)
    columns = ("subject", "group", "status", "n_scans", "time_span_years",
               "volume_rate_ml_per_year", "mean_normal_displacement_outward_rate_mm_per_year",
               "mean_normal_displacement_outward_rate_stderr_mm_per_year", "covered_fraction",
               "cycle_error_raw_per_sqrt_area", "cycle_error_synchronised_per_sqrt_area",
               "error", "warnings")
    table = [{c: r.get(c, "") for c in columns} for r in rows]
    return write_report(out / "series_report.html", title=title,
                        subtitle="Rates of change along each subject's series of scans, from the "
                                 "cohort folder's series.csv and stored series results.",
                        panels=[panel] if panel is not None else [], summary=summary,
                        tables={"Series per subject (series.csv)": table}, figures=figures,
                        figure_dir=out / "series_figures",
                        provenance={"cohort folder": str(out)})
