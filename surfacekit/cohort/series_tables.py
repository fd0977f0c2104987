"""The series stage of a cohort run: run the series tasks, then write the series tables in
manifest order (see :mod:`surfacekit.cohort.series` for the files and their columns).

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

from pathlib import Path

import dask.array as da
import numpy as np

from ..analysis.stats import vertexwise_group_test
from ..io.tables import write_csv, write_json
from .engines import run_tasks
from .manifest import Manifest
from .series import RATE_FIELDS, SERIES_COLUMNS, plan_tasks, run_series
from .series_regions import region_columns, template_regions
from .store import FieldStore, create_field_store
from .tables import covariate_matrix, two_groups

RATE_FIELD = "normal_displacement_outward_rate_mm_per_year"
RATE_UNITS = {"normal_displacement_outward_rate_mm_per_year": "mm/year, + outward",
              "normal_displacement_outward_rate_stderr_mm_per_year": "mm/year",
              "log_area_ratio_scan_over_baseline_rate_per_year": "1/year, + growth",
              "log_area_ratio_scan_over_baseline_rate_stderr_per_year": "1/year"}


def _series_row(entry, row: dict, plan) -> dict:
    """One subject's row of series.csv (rates empty, with the reason, when there are none)."""
    values = row.get("values") or {}
    left_out = sum(not r["used"] for r in plan.rows)
    warnings = list(plan.warnings) + list(values.get("warnings", []))
    if left_out:
        warnings.insert(0, f"{left_out} manifest row(s) of this subject left out (reason per "
                           "row in series_scans.csv)")
    if row["status"] == "ok" and not row["template_ok"]:
        warnings.append("no rate map on the template: the baseline's comparison with the "
                        "template failed (its error is in cohort_summary.csv)")
    out = {**values.get("row", {}), "subject": entry.subject, "group": entry.group,
           "status": row["status"], "error": row.get("error", ""),
           "n_manifest_rows": len(plan.rows), "warnings": "; ".join(warnings)}
    out.setdefault("n_scans", len(plan.used))
    return out


def write_rate_fields(path, man: Manifest, rows: list[dict], out: Path,
                      n_template: int) -> FieldStore:
    """``series_fields.zarr``: the per-subject rate fields on the template vertices in a field
    store (:mod:`surfacekit.cohort.store`: one chunk per subject and field, rows in manifest
    order, ``written`` = a rate on the template exists: the series and the baseline's
    template comparison both succeeded).  A resumed run reuses the store and rewrites only
    the rows of series computed in this run; rows without a rate are cleared."""
    store = create_field_store(path, [e.subject for e in man.subjects],
                               {name: (n_template,) for name in RATE_FIELDS}, units=RATE_UNITS)
    dirs = [out / "subjects" / e.subject for e in man.subjects]
    done, flagged = store.written(), store.written(RATE_FIELDS[0])
    for i, (sdir, row) in enumerate(zip(dirs, rows)):
        if not (row["status"] == "ok" and row.get("template_ok", False)):
            if flagged[i]:
                store.clear_subject(i)
            continue
        if row.get("cached") and done[i]:
            continue
        with np.load(sdir / "fields.npz", allow_pickle=False) as data:
            target = np.asarray(data["target_vertex"], dtype=np.int64)
        with np.load(sdir / "series" / "rates.npz", allow_pickle=False) as data:
            store.write_subject(i, {name: np.asarray(data[name], np.float64)[target]
                                    for name in RATE_FIELDS})
    return store


def write_rate_group_test(path, man: Manifest, store: FieldStore, *,
                          n_permutations: int, seed: int) -> Path | None:
    """``group_test_rates.csv``: the vertex-wise two-group test (permutation max-T, Nichols &
    Holmes 2002; FDR, Benjamini & Hochberg 1995) of the normal displacement rate
    (mm/year, + outward) on the template, adjusted for the usable covariates of the
    baseline rows, read from the rate field store chunk by chunk; the first group in
    manifest order is the reference; vertices where a subject has no rate are not tested.
    None (nothing written) without two groups of at least two subjects with a rate."""
    ok = store.written()
    pair = two_groups(man, [{"status": "ok" if good else "no"} for good in ok])
    if pair is None:
        return None
    groups = np.array([e.group for e in man.subjects])
    ref, other = pair
    in_ref, in_other = ok & (groups == ref), ok & (groups == other)
    covered = np.asarray(da.isfinite(store.dask(RATE_FIELD, in_ref | in_other)).all(axis=0)
                         .compute())
    entries = ([e for e, m in zip(man.subjects, in_other) if m]
               + [e for e, m in zip(man.subjects, in_ref) if m])
    cov, used, dropped = covariate_matrix(entries)
    a, b = store.dask(RATE_FIELD, in_other), store.dask(RATE_FIELD, in_ref)
    res = vertexwise_group_test(a[:, covered], b[:, covered], n_permutations=n_permutations,
                                seed=seed, covariates=cov)
    unit = "outward_rate_mm_per_year"
    header = ["vertex", f"mean_{ref}_{unit}", f"mean_{other}_{unit}", f"t_{other}_minus_{ref}",
              "p_uncorrected", "p_fwer", "q_fdr"]
    columns = np.full((6, len(covered)), np.nan)
    columns[0], columns[1] = (np.asarray(store.dask(RATE_FIELD, m).mean(axis=0).compute())
                              for m in (in_ref, in_other))
    columns[2:, covered] = [np.asarray(getattr(res, k)) for k in
                            ("t", "p_uncorrected", "p_fwer", "q_fdr")]
    table = [dict(zip(header, (i, *c))) for i, c in enumerate(columns.T)]
    write_json(Path(path).with_suffix(".json"), {
        "field": "normal displacement rate (mm/year, + outward)", "reference_group": ref,
        "contrast": f"{other} minus {ref}", "groups": {ref: int(in_ref.sum()),
                                                       other: int(in_other.sum())},
        "covariates_used": used, "covariates_dropped": dropped,
        "vertices_tested": int(covered.sum()), "n_permutations": int(n_permutations),
        "seed": int(seed)})
    return write_csv(path, table, columns=header)


def series_lines(series: list[dict]) -> list[str]:
    """The series counts in one line for the cohort summary (empty without series)."""
    if not series:
        return []
    count = {k: sum(s["status"] == k for s in series) for k in ("ok", "no_rate", "failed")}
    return [(f"series: {count['ok']} with rates, {count['no_rate']} without (fewer than two "
            f"dated scans), {count['failed']} failed (see series.csv)")]


def run_series_stage(man: Manifest, out: Path, subject_rows: list[dict], tables: dict,
                     options: dict, match_options, *, force: bool, workers: int, scheduler,
                     max_tasks_per_worker, n_template: int, n_permutations: int) -> list[dict]:
    """Run (or reuse) every subject's series and write the series tables into `tables`.

    `subject_rows` are the rows of the baselines' template comparison, in manifest order.
    Returns per subject ``{"subject", "status", "error"}`` with status ``ok``, ``no_rate``
    (fewer than two scans with a valid time) or ``failed``; nothing for a manifest without
    scan times.
    """
    if man.scans is None:
        return []
    rows, tasks, plans = plan_tasks(man, out, options, match_options, force)
    for done in run_tasks(tasks, workers=workers, scheduler=scheduler,
                          max_tasks_per_worker=max_tasks_per_worker, worker=run_series):
        rows[done["index"]] = done
    for row, subject_row in zip(rows, subject_rows):
        row["template_ok"] = subject_row["status"] == "ok"
    table = [_series_row(e, r, plans[e.subject]) for e, r in zip(man.subjects, rows)]
    regions = template_regions(man.template, out)
    if regions is not None:   # rates per template region, for subjects with a rate on it
        for entry, row, line in zip(man.subjects, rows, table):
            if row["status"] == "ok" and row["template_ok"]:
                line.update(region_columns(out / "subjects" / entry.subject, regions))
    columns = list(SERIES_COLUMNS) + list(dict.fromkeys(k for r in table for k in r
                                                        if k.startswith("region_")))
    tables["series"] = write_csv(out / "series.csv", table, columns=columns)
    tables["series_scans"] = write_csv(out / "series_scans.csv",
                                       [r for e in man.subjects for r in plans[e.subject].rows])
    store = write_rate_fields(out / "series_fields.zarr", man, rows, out, n_template)
    tables["series_fields"] = store.path
    test_file = out / "group_test_rates.csv"
    written = write_rate_group_test(test_file, man, store, n_permutations=n_permutations,
                                    seed=options["seed"])
    if written is None:
        for stale in (test_file, test_file.with_suffix(".json")):
            stale.unlink(missing_ok=True)
    else:
        tables["group_test_rates"] = written
    return [{"subject": e.subject, "status": r["status"], "error": r.get("error", "")}
            for e, r in zip(man.subjects, rows)]
