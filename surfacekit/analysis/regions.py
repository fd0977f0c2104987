"""Regional summaries of change fields and their CSV form."""
from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

RESEARCH_NOTE = ("For research use only; not for diagnosis or treatment decisions. Clinical use "
                 "must follow local regulations and qualified professional judgement.")

COLUMNS = ("label", "name", "n_vertices", "area_mm2", "mean_normal_displacement_mm",
           "median_normal_displacement_mm", "p5_normal_displacement_mm",
           "p95_normal_displacement_mm", "mean_abs_normal_displacement_mm",
           "area_change_percent", "mean_confidence")


def _weighted_percentile(x: np.ndarray, w: np.ndarray, q: float) -> float:
    """Area-weighted percentile (q in 0..100) by interpolating the weighted CDF at mid-weights."""
    order = np.argsort(x, kind="stable")
    xs, ws = x[order], w[order]
    cdf = (np.cumsum(ws) - 0.5 * ws) / ws.sum()
    return float(np.interp(q / 100.0, cdf, xs))


def regional_rows(normal_displacement: np.ndarray, log_area_ratio: np.ndarray,
                  vertex_areas: np.ndarray, confidence: np.ndarray,
                  labels: np.ndarray | None, names: dict | None) -> list[dict]:
    """One dict per region (see `ChangeReport.regional_table`); statistics are area-weighted."""
    names = names or {}
    if labels is None:
        groups = [("all", "all", np.ones(normal_displacement.shape[0], dtype=bool))]
    else:
        groups = [(int(k), str(names.get(int(k), names.get(str(k), f"region_{k}"))), labels == k)
                  for k in np.unique(labels)]
    rows = []
    for label, name, mask in groups:
        nd, w = normal_displacement[mask], vertex_areas[mask]
        wn = w / w.sum()
        rows.append({
            "label": label, "name": name, "n_vertices": int(mask.sum()),
            "area_mm2": float(w.sum()),
            "mean_normal_displacement_mm": float(wn @ nd),
            "median_normal_displacement_mm": _weighted_percentile(nd, w, 50),
            "p5_normal_displacement_mm": _weighted_percentile(nd, w, 5),
            "p95_normal_displacement_mm": _weighted_percentile(nd, w, 95),
            "mean_abs_normal_displacement_mm": float(wn @ np.abs(nd)),
            "area_change_percent": float(100.0 * (wn @ np.exp(log_area_ratio[mask]) - 1.0)),
            "mean_confidence": float(wn @ confidence[mask]),
        })
    return rows


def _fmt(v) -> str:
    if isinstance(v, float):
        return f"{v:.6f}" if np.isfinite(v) else "nan"
    return str(v)


def write_csv(path, rows: list[dict]) -> Path:
    """Write rows with the fixed columns, 6 decimals, '\\n' line ends; atomic."""
    from ..io.files import atomic_path

    path = Path(path)
    with atomic_path(path, suffix=".csv") as tmp, \
            open(tmp, "w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(COLUMNS)
        for r in rows:
            writer.writerow([_fmt(r[c]) for c in COLUMNS])
    return path
