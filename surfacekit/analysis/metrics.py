"""The change metrics: one definition per name, used by the change summary, the regional
table and the cohort tables.

Every statistic of a per-vertex field is area-weighted with the baseline vertex
areas (the barycentric share of the surrounding triangles), so a metric does not
depend on how densely a region happens to be meshed.
"""
from __future__ import annotations

import numpy as np

#: columns of the regional table, in order (``label``, ``name``, then the metrics)
METRIC_NAMES = (
    "n_vertices", "area_mm2",
    "mean_normal_displacement_outward_mm", "median_normal_displacement_outward_mm",
    "p5_normal_displacement_outward_mm", "p95_normal_displacement_outward_mm",
    "min_normal_displacement_outward_mm", "max_normal_displacement_outward_mm",
    "mean_abs_normal_displacement_mm", "p95_abs_normal_displacement_mm",
    "max_abs_normal_displacement_mm",
    "mean_log_area_ratio_followup_over_baseline", "mapped_area_change_followup_minus_baseline_percent", "mean_confidence",
)
REGION_COLUMNS = ("label", "name", *METRIC_NAMES)


def weighted_percentile(x: np.ndarray, w: np.ndarray, q: float) -> float:
    """Area-weighted percentile (q in 0..100) by interpolating the weighted CDF at mid-weights."""
    order = np.argsort(x, kind="stable")
    xs, ws = x[order], w[order]
    cdf = (np.cumsum(ws) - 0.5 * ws) / ws.sum()
    return float(np.interp(q / 100.0, cdf, xs))


def change_metrics(report, mask: np.ndarray | None = None) -> dict:
    """The change metrics of a :class:`ChangeReport` over all vertices or a region.

    Parameters
    ----------
    report : ChangeReport (its ``normal_displacement``, ``log_area_ratio``,
        ``vertex_areas`` and ``confidence`` arrays are used)
    mask : (n,) bool selecting the region's baseline vertices; None = all.  Vertices
        whose change is NaN (left out along the boundary of an open surface) are not
        counted, in neither the vertex count nor the area nor any statistic; a region
        left with none gives zero vertices, zero area and NaN statistics.

    Returns
    -------
    dict with the keys of :data:`METRIC_NAMES`: the vertex count, the region's area
    (mm²), area-weighted mean, median, 5th and 95th percentile, minimum and maximum of
    the normal displacement (mm, ``..._outward_mm``: positive = follow-up outside the
    baseline), mean, 95th percentile and maximum of its absolute value (mm), the
    area-weighted mean log area ratio (ln(follow-up / baseline area): positive = growth),
    the mapped area change (%, follow-up minus baseline, from the area-weighted mean of
    ``exp(log_area_ratio)``) and the mean confidence.  Every signed name states its sign.
    """
    nd = np.asarray(report.normal_displacement, dtype=np.float64)
    lar = np.asarray(report.log_area_ratio, dtype=np.float64)
    w = np.asarray(report.vertex_areas, dtype=np.float64)
    conf = np.asarray(report.confidence, dtype=np.float64)
    if mask is not None:
        nd, lar, w, conf = nd[mask], lar[mask], w[mask], conf[mask]
    if not len(nd):
        raise ValueError("change_metrics: the region has no vertices")
    measured = np.isfinite(nd) & np.isfinite(lar)
    if not measured.all():  # open surfaces: vertices left out near a cut (NaN) do not count
        nd, lar, w, conf = nd[measured], lar[measured], w[measured], conf[measured]
    if not len(nd):
        return {k: (0 if k == "n_vertices" else 0.0 if k == "area_mm2" else float("nan"))
                for k in METRIC_NAMES}
    wn = w / w.sum()
    absolute = np.abs(nd)
    return {
        "n_vertices": len(nd), "area_mm2": float(w.sum()),
        "mean_normal_displacement_outward_mm": float(wn @ nd),
        "median_normal_displacement_outward_mm": weighted_percentile(nd, w, 50),
        "p5_normal_displacement_outward_mm": weighted_percentile(nd, w, 5),
        "p95_normal_displacement_outward_mm": weighted_percentile(nd, w, 95),
        "min_normal_displacement_outward_mm": float(nd.min()),
        "max_normal_displacement_outward_mm": float(nd.max()),
        "mean_abs_normal_displacement_mm": float(wn @ absolute),
        "p95_abs_normal_displacement_mm": weighted_percentile(absolute, w, 95),
        "max_abs_normal_displacement_mm": float(absolute.max()),
        "mean_log_area_ratio_followup_over_baseline": float(wn @ lar),
        "mapped_area_change_followup_minus_baseline_percent": float(100.0 * (wn @ np.exp(lar) - 1.0)),
        "mean_confidence": float(wn @ conf),
    }


def regional_rows(report, labels: np.ndarray | None, names: dict | None) -> list[dict]:
    """One row per region label (sorted): ``label``, ``name`` and :func:`change_metrics`.

    Without labels, one row ``label = name = "all"`` covers the whole surface.
    """
    names = names or {}
    if labels is None:
        return [{"label": "all", "name": "all", **change_metrics(report)}]
    return [{"label": int(k), "name": str(names.get(int(k), names.get(str(k), f"region_{k}"))),
             **change_metrics(report, labels == k)} for k in np.unique(labels)]
