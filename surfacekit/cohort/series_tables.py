"""The series stage of a cohort run: run the series tasks, then write the series tables in
manifest order (see :mod:`surfacekit.cohort.series` for the files and their columns).

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import zipfile
from pathlib import Path

import numpy as np

from ..analysis.stats import vertexwise_group_test
from ..io.files import atomic_path
from ..io.npz import npz_member
from ..io.tables import write_csv, write_json
from .engines import run_tasks
from .manifest import Manifest
from .series import RATE_FIELDS, SERIES_COLUMNS, plan_tasks, run_series
from .tables import covariate_matrix, two_groups

RATE_FIELD = "normal_displacement_outward_rate_mm_per_year"


def _series_row(entry, row: dict, plan) -> dict:
    """One subject's row of series.csv (rates empty, with the reason, when there are none)."""
    values = row.get("values") or {}
    left_out = sum(not r["used"] for r in plan.rows)
    warnings = list(plan.warnings) + list(values.get("warnings", []))
    if left_out:
        warnings.insert(0, f"{left_out} manifest row(s) of this subject left out (reason per "
                           "row in series_scans.csv)")
    out = {**values.get("row", {}), "subject": entry.subject, "group": entry.group,
           "status": row["status"], "error": row.get("error", ""),
           "n_manifest_rows": len(plan.rows), "warnings": "; ".join(warnings)}
    out.setdefault("n_scans", len(plan.used))
    for name, rates in (values.get("regions") or {}).items():
        if name != "all":
            out.update({f"region_{name}_{k}": v for k, v in rates.items()})
    return out


def _rate_rows(subject_dirs: list[Path], rows: list[dict], n_template: int, name: str):
    """Per subject, the rate field `name` on the template vertices (NaN without a rate):
    the baseline's rate at the vertex each template vertex was matched to."""
    for sdir, row in zip(subject_dirs, rows):
        out = np.full(n_template, np.nan)
        if row["status"] == "ok" and row.get("template_ok", False):
            with np.load(sdir / "fields.npz", allow_pickle=False) as data:
                target = np.asarray(data["target_vertex"], dtype=np.int64)
            with np.load(sdir / "series" / "rates.npz", allow_pickle=False) as data:
                out = np.asarray(data[name], dtype=np.float64)[target]
        yield out


def write_rate_fields(path, man: Manifest, rows: list[dict], out: Path,
                      n_template: int) -> Path:
    """``series_fields.npz``: (subjects, template vertices) rate matrices, streamed row by row,
    with ``subjects``, ``groups`` and ``ok`` (a rate on the template exists: the series and
    the baseline's template comparison both succeeded).  The one place that stores the
    per-subject rate fields of a cohort (byte-reproducible: fixed zip time stamps)."""
    dirs = [out / "subjects" / e.subject for e in man.subjects]
    ok = np.array([r["status"] == "ok" and r.get("template_ok", False) for r in rows])
    with atomic_path(Path(path), suffix=".npz") as tmp, \
            zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for name, arr in (("subjects", np.array([e.subject for e in man.subjects])),
                          ("groups", np.array([e.group for e in man.subjects])), ("ok", ok)):
            with npz_member(zf, name) as fh:
                np.lib.format.write_array(fh, arr, allow_pickle=False)
        for name in RATE_FIELDS:
            header = {"descr": np.lib.format.dtype_to_descr(np.dtype(np.float64)),
                      "fortran_order": False, "shape": (len(dirs), n_template)}
            with npz_member(zf, name) as fh:
                np.lib.format.write_array_header_1_0(fh, header)
                for values in _rate_rows(dirs, rows, n_template, name):
                    fh.write(values.tobytes())
    return Path(path)


def write_rate_group_test(path, man: Manifest, rows: list[dict], fields_file, *,
                          n_permutations: int, seed: int) -> Path | None:
    """``group_test_rates.csv``: the vertex-wise two-group test (permutation max-T, Nichols &
    Holmes 2002; FDR, Benjamini & Hochberg 1995) of the normal displacement rate
    (mm/year, + outward) on the template, adjusted for the usable covariates of the
    baseline rows; the first group in manifest order is the reference.  None (nothing
    written) without two groups of at least two subjects with a rate."""
    pair = two_groups(man, [{"status": "ok" if r["status"] == "ok" and r.get("template_ok")
                              else "no"} for r in rows])
    if pair is None:
        return None
    with np.load(fields_file, allow_pickle=False) as data:
        rate, ok, groups = data[RATE_FIELD], data["ok"], data["groups"]
    ref, other = pair
    in_ref, in_other = ok & (groups == ref), ok & (groups == other)
    covered = np.all(np.isfinite(rate[in_ref | in_other]), axis=0)
    entries = ([e for e, m in zip(man.subjects, in_other) if m]
               + [e for e, m in zip(man.subjects, in_ref) if m])
    cov, used, dropped = covariate_matrix(entries)
    res = vertexwise_group_test(rate[in_other][:, covered], rate[in_ref][:, covered],
                                n_permutations=n_permutations, seed=seed, covariates=cov)
    unit = "outward_rate_mm_per_year"
    header = ["vertex", f"mean_{ref}_{unit}", f"mean_{other}_{unit}", f"t_{other}_minus_{ref}",
              "p_uncorrected", "p_fwer", "q_fdr"]
    columns = [np.full((4, rate.shape[1]), np.nan)]
    columns[0][:, covered] = [np.asarray(getattr(res, k)) for k in
                              ("t", "p_uncorrected", "p_fwer", "q_fdr")]
    table = [dict(zip(header, (i, a, b, *c))) for i, (a, b, c) in enumerate(zip(
        rate[in_ref].mean(axis=0), rate[in_other].mean(axis=0), columns[0].T))]
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
    columns = list(SERIES_COLUMNS) + sorted({k for r in table for k in r
                                             if k.startswith("region_")})
    tables["series"] = write_csv(out / "series.csv", table, columns=columns)
    tables["series_scans"] = write_csv(out / "series_scans.csv",
                                       [r for e in man.subjects for r in plans[e.subject].rows])
    tables["series_fields"] = write_rate_fields(out / "series_fields.npz", man, rows, out,
                                                n_template)
    test_file = out / "group_test_rates.csv"
    written = write_rate_group_test(test_file, man, rows, tables["series_fields"],
                                    n_permutations=n_permutations, seed=options["seed"])
    if written is None:
        for stale in (test_file, test_file.with_suffix(".json")):
            stale.unlink(missing_ok=True)
    else:
        tables["group_test_rates"] = written
    return [{"subject": e.subject, "status": r["status"], "error": r.get("error", "")}
            for e, r in zip(man.subjects, rows)]
