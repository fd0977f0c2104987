"""Series of scans in a cohort: one task per subject, resumable, and the series tables.

For a series manifest (a ``date`` or ``time_years`` column, see
:mod:`surfacekit.cohort.manifest` and :mod:`surfacekit.cohort.timeline`), each subject
with two or more scans of valid time runs
:func:`surfacekit.analysis.longitudinal.compare_series` in a worker: every scan is
loaded and prepared like a cohort subject, the maps are synchronised through the
baseline, and the rates are written under ``subjects/<id>/series/`` (``rates.npz``:
per-baseline-vertex rate fields and each follow-up's normal displacement;
``series.json``: the row, the trajectories and the cycle errors) with a completion marker named by a key of every scan's bytes and time,
the options and the version, so an interrupted run resumes and a re-run skips
finished series.  The tables are then written in manifest order:

``series.csv``          one row per subject: scans used, time span, whole-surface and
                        regional rates with their standard errors (signs in the
                        column names), covered fraction, cycle errors, warnings; a
                        subject without a rate says why (empty cells, never zero).
``series_scans.csv``    one row per manifest scan row: used or not, and the reason.
``series_fields.zarr``  per-subject rate fields on the template vertices (through the
                        subject's template -> baseline map) in a field store
                        (:mod:`surfacekit.cohort.store`), rows in manifest order.
``group_test_rates.csv`` the vertex-wise group test of the normal displacement rate,
                        when there are two groups.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import dataclasses
import json
import math
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from ..analysis.longitudinal import compare_series
from ..correspondence import MatchOptions
from ..io.files import atomic_path, save_fields
from ..io.tables import write_json
from ..version import __version__
from .manifest import Manifest, cache_key, file_digest
from .subject import (
    MARKER_SUFFIX,
    load_input_surface,
    prepare_surface,
    record_failure,
    worker_info,
)
from .timeline import plan_series, scan_times

SERIES_VERSION = "series-1"
#: per-subject rate fields, carried to the template vertices in ``series_fields.npz``
RATE_FIELDS = ("normal_displacement_outward_rate_mm_per_year",
               "normal_displacement_outward_rate_stderr_mm_per_year",
               "log_area_ratio_scan_over_baseline_rate_per_year",
               "log_area_ratio_scan_over_baseline_rate_stderr_per_year")
SERIES_COLUMNS = (
    "subject", "group", "status", "error", "n_scans", "n_manifest_rows", "time_span_years",
    "volume_rate_ml_per_year", "volume_rate_stderr_ml_per_year",
    "mean_normal_displacement_outward_rate_mm_per_year",
    "mean_normal_displacement_outward_rate_stderr_mm_per_year",
    "mean_log_area_ratio_scan_over_baseline_rate_per_year",
    "mean_log_area_ratio_scan_over_baseline_rate_stderr_per_year",
    "covered_fraction", "cycle_error_raw_per_sqrt_area", "cycle_error_synchronised_per_sqrt_area",
    "warnings")


@dataclass(frozen=True)
class SeriesTask:
    """Everything a worker needs for one subject's series (small and picklable)."""

    index: int                  # position of the subject in the manifest
    subject: str
    key: str
    subject_dir: str
    scans: tuple                # ((path, label, units, years since baseline, name), ...)
    options: dict
    match_options: MatchOptions


def _digest(path: Path) -> str:
    try:
        return file_digest(path)
    except OSError:
        return "unreadable"


def plan_tasks(man: Manifest, out: Path, options: dict, match_options: MatchOptions,
               force: bool) -> tuple[list[dict | None], list[SeriesTask], dict]:
    """Stored rows of finished series, tasks for the others, and each subject's plan."""
    rows: list[dict | None] = [None] * len(man.subjects)
    tasks, plans = [], {}
    for i, entry in enumerate(man.subjects):
        plan = plan_series(man.scans[entry.subject])
        plans[entry.subject] = plan
        if len(plan.used) < 2:
            rows[i] = {"status": "no_rate", "error": (
                "no scan with a valid time" if not plan.used else
                "one scan with a valid time: a rate needs two or more"), "values": {}}
            continue
        times = scan_times(plan)
        scans = tuple((str(e.path), e.label, e.units, t, f"line {e.line}")
                      for (e, _), t in zip(plan.used, times))
        key = cache_key(input_digest=json.dumps([[_digest(e.path), t] for (e, _), t in
                                                 zip(plan.used, times)]),
                        label=None, template_key=SERIES_VERSION,
                        options={**options, "units": [e.units for e, _ in plan.used],
                                 "labels": [e.label for e, _ in plan.used]},
                        version=__version__)
        sdir = out / "subjects" / entry.subject / "series"
        stored = None if force else read_series(sdir, key)
        if stored is not None:
            rows[i] = {"status": "ok", "error": "", "values": stored, "cached": True}
        else:
            tasks.append(SeriesTask(i, entry.subject, key, str(sdir), scans, options,
                                    match_options))
    return rows, tasks, plans


def read_series(sdir: Path, key: str) -> dict | None:
    """The stored values of a series finished under `key`, or None."""
    if not ((sdir / f"{key}{MARKER_SUFFIX}").is_file() and (sdir / "rates.npz").is_file()):
        return None
    try:
        stored = json.loads((sdir / "series.json").read_text())
    except (OSError, ValueError):
        return None
    return stored["values"] if stored.get("key") == key else None


def _values(comp) -> dict:
    """The JSON-able result of one series: the series.csv row and the trajectories."""
    s = comp.rates.summary
    row = {k: s[k] for k in SERIES_COLUMNS if k in s}
    row.update(n_scans=len(comp.times_years), time_span_years=float(comp.times_years[-1]),
               covered_fraction=comp.covered_fraction,
               cycle_error_raw_per_sqrt_area=comp.cycle_error["raw_mean"],
               cycle_error_synchronised_per_sqrt_area=comp.cycle_error["synchronised_mean"])
    return {"row": row, "regions": s["regions"], "cycle_error": comp.cycle_error,
            "agreement": comp.agreement, "warnings": comp.warnings,
            "trajectories": [{"time_years": t["time_years"], "volume_ml": t["volume_ml"],
                              "regions": {name: {k: v for k, v in r.items()
                                                 if k.startswith("mean_")}
                                          for name, r in t["regions"].items()}}
                             for t in comp.rates.trajectories]}


def _json_safe(obj):
    """NaN as None (JSON has no NaN), recursively."""
    if isinstance(obj, float):
        return None if math.isnan(obj) else obj
    if isinstance(obj, dict):
        return {k: _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_safe(v) for v in obj]
    return obj


def run_series(task: SeriesTask) -> dict:
    """Compute and store one subject's series; never raises: failures come back as rows."""
    out = Path(task.subject_dir)
    row = {"index": task.index, "subject": task.subject, "key": task.key, "cached": False}
    start = time.perf_counter()
    try:
        out.mkdir(parents=True, exist_ok=True)
        for stale in out.glob(f"*{MARKER_SUFFIX}"):
            stale.unlink()
        with threadpool_limits(limits=1):
            surfaces = [prepare_surface(load_input_surface(p, lab, u), task.options)
                        for p, lab, u, _, _ in task.scans]
            # the run's landmark pairs index the template and a subject, not two scans
            options = dataclasses.replace(task.match_options, landmarks=())
            comp = compare_series(surfaces, [s[3] for s in task.scans],
                                  options=options, seed=task.options["seed"],
                                  scan_names=[s[4] for s in task.scans])
        values = _json_safe(_values(comp))
        save_fields(out / "rates.npz", times_years=comp.times_years, **comp.rates.fields(),
                    normal_displacement_per_scan=np.vstack(
                        [c.normal_displacement for c in comp.changes]))
        write_json(out / "series.json", {"subject": task.subject, "key": task.key,
                                         "values": values})
        with atomic_path(out / f"{task.key}{MARKER_SUFFIX}", suffix=MARKER_SUFFIX) as tmp:
            tmp.write_text(task.key + "\n")
        row.update(status="ok", error="", values=values)
    except Exception as exc:  # noqa: BLE001 - a failing series must not stop the cohort
        record_failure(row, out, exc)
    row["timings"] = {"total": time.perf_counter() - start}
    row["worker"] = worker_info()
    return row
