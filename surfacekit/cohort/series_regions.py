"""Regional rates of a series cohort on the template's regions.

When the cohort template carries region labels (a per-vertex ``label`` field, e.g. a
PLY vertex property, with names in ``<template file>.regions.csv``, columns
``label,name``, as ``surfacekit change --regions`` reads them), each subject's regional
trajectory is the area-weighted mean normal displacement (mm, + outward) over each
template region of every follow-up scan, read on the template vertices through the
subject's template -> baseline map; its rate is fitted by
:func:`surfacekit.analysis.rates.change_rate`.  The labels reach the prepared
(resampled) template through the nearest raw template vertex.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import csv
import re
from pathlib import Path

import numpy as np
from scipy.spatial import cKDTree

from ..analysis.rates import change_rate
from ..io.files import load_with_fields
from ..mesh.surface import Surface

LABEL_FIELD = "label"
STEM = "mean_normal_displacement_outward_rate"


def _names(template_file: Path) -> dict[int, str]:
    """``{label: name}`` from ``<template>.regions.csv`` beside the template, if present."""
    side = template_file.with_name(template_file.name + ".regions.csv")
    if not side.is_file():
        return {}
    names = {}
    with open(side, newline="", encoding="utf-8") as fh:
        for row in csv.DictReader(fh):
            try:
                names[int(row["label"])] = row["name"].strip()
            except (KeyError, TypeError, ValueError):
                continue
    return names


def column_name(name: str) -> str:
    """A region name as it appears inside a column name (letters, digits, '_')."""
    return re.sub(r"[^A-Za-z0-9]+", "_", str(name)).strip("_") or "region"


def template_regions(entry, out: Path) -> tuple[Surface, np.ndarray, dict] | None:
    """(prepared template, labels on it, {label: name}) when the template file carries a
    per-vertex ``label`` field; None otherwise (then only whole-surface rates are given)."""
    tfile = out / "template" / "template.npz"
    if entry.is_volume or not tfile.is_file():
        return None
    try:
        raw, fields = load_with_fields(entry.path, entry.units)
    except (OSError, ValueError):
        return None
    labels = np.asarray(fields.get(LABEL_FIELD, np.empty(0)))
    if labels.shape != (raw.n_vertices,) or not np.allclose(labels, np.round(labels)):
        return None
    with np.load(tfile, allow_pickle=False) as data:
        template = Surface(data["vertices"], data["faces"])
    nearest = cKDTree(raw.vertices).query(template.vertices)[1]
    carried = np.round(labels[nearest]).astype(np.int64)
    names = _names(Path(entry.path))
    return template, carried, {int(k): names.get(int(k), f"region_{int(k)}")
                               for k in np.unique(carried)}


def region_trajectories(subject_dir: Path, regions) -> tuple[np.ndarray, dict[str, np.ndarray]]:
    """(times in years, {region name: mean normal displacement per scan, the baseline's 0
    first}) of one subject on the template regions."""
    template, labels, names = regions
    with np.load(subject_dir / "fields.npz", allow_pickle=False) as data:
        target = np.asarray(data["target_vertex"], dtype=np.int64)
    with np.load(subject_dir / "series" / "rates.npz", allow_pickle=False) as data:
        times = np.asarray(data["times_years"], dtype=np.float64)
        per_scan = np.asarray(data["normal_displacement_per_scan"], dtype=np.float64)[:, target]
    areas = template.vertex_areas
    out = {}
    for label, name in names.items():
        mask = labels == label
        w = np.where(np.isfinite(per_scan[:, mask]), areas[mask], 0.0)
        total = w.sum(axis=1)
        means = np.where(total > 0, (w * np.nan_to_num(per_scan[:, mask])).sum(axis=1)
                         / np.where(total > 0, total, 1.0), np.nan)
        out[name] = np.concatenate([[0.0], means])
    return times, out


def region_columns(subject_dir: Path, regions) -> dict:
    """One subject's regional rate columns of series.csv: per template region,
    ``region_<name>_mean_normal_displacement_outward_rate_mm_per_year`` and its standard error."""
    times, trajectories = region_trajectories(subject_dir, regions)
    row = {}
    for name, values in trajectories.items():
        fit = change_rate(times, values)
        row[f"region_{column_name(name)}_{STEM}_mm_per_year"] = float(fit.slope)
        row[f"region_{column_name(name)}_{STEM}_stderr_mm_per_year"] = float(fit.stderr)
    return row
