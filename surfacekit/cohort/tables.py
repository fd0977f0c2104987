"""Cohort tables written after the per-subject work, always in manifest order.

``cohort_summary.csv``  one row per subject: manifest columns, status, one-line
                        error, and the subject's scalars (``%.6g`` text of
                        :func:`surfacekit.io.tables.format_value`).
``cohort_fields.npz``   per-template-vertex matrices (subjects x template vertices),
                        NaN rows for failed subjects, exported row by row from the
                        cohort's field store (:mod:`surfacekit.cohort.store`).
``group_test.csv``      vertex-wise two-group test of the normal displacement
                        (seeded permutations) when exactly two groups exist; the first
                        group in manifest order is the reference: column
                        ``t_<second>_minus_<first>``.
``group_test.json``     its groups, contrast and the covariates used and dropped (with why).
"""
from __future__ import annotations

import warnings
import zipfile
from pathlib import Path

import numpy as np

from ..analysis.stats import vertexwise_group_test
from ..io.files import atomic_path
from ..io.npz import npz_member
from ..io.tables import write_csv, write_json
from .manifest import Manifest
from .store import FieldStore
from .subject import CHANGE_COLUMNS

SCALAR_COLUMNS = ("n_vertices_input", "n_vertices", "volume_ml", "area_mm2",
                  "volume_change_subject_minus_template_ml",
                  *CHANGE_COLUMNS, "spectral_distance", "mean_match_confidence",
                  "match_turn_ambiguous", "covered_fraction_of_template")
RESULT_COLUMNS = ("subject", "group", "label", "status", "error", *SCALAR_COLUMNS)
VERTEX_FIELDS = ("normal_displacement", "log_area_ratio")
SAME = "the same value for every subject tested"


def check_covariate_names(manifest: Manifest) -> None:
    """Refuse extra manifest columns named like a column the cohort table computes."""
    clash = sorted(set(manifest.covariate_names) & set(RESULT_COLUMNS))
    if clash:
        raise ValueError(f"manifest {manifest.path.name}: column(s) {', '.join(clash)} clash with "
                         "the cohort table's own columns; rename them")


def write_summary(path, manifest: Manifest, rows: list[dict]) -> Path:
    """``cohort_summary.csv``: subject, group, label, covariates, status, error, scalars."""
    header = ["subject", "group", "label", *manifest.covariate_names, "status", "error",
              *SCALAR_COLUMNS]
    table = [{**entry.covariates, **(row.get("values") or {}), "subject": entry.subject,
              "group": entry.group, "label": entry.label, "status": row["status"],
              "error": row.get("error", "")}
             for entry, row in zip(manifest.subjects, rows)]
    return write_csv(path, table, columns=header)


def write_fields_matrix(path, manifest: Manifest, rows: list[dict], store: FieldStore) -> Path:
    """``cohort_fields.npz``: (s, n_template) float64 matrices in manifest order, from the store.

    Each matrix is streamed one subject row at a time, so memory stays at one
    row however large the cohort.  Also stores ``subjects``, ``groups``, ``ok`` (s,)
    and ``laplace_spectrum`` (s, k).  Fixed zip time stamps make the file byte-reproducible.
    """
    s = len(manifest.subjects)
    ok = np.array([r["status"] == "ok" for r in rows]) & store.written()
    names = {"subjects": np.array([e.subject for e in manifest.subjects]),
             "groups": np.array([e.group for e in manifest.subjects]), "ok": ok}
    with atomic_path(Path(path), suffix=".npz") as tmp, \
            zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for name, arr in names.items():
            with npz_member(zf, name) as fh:
                np.lib.format.write_array(fh, arr, allow_pickle=False)
        for name in (*VERTEX_FIELDS, "laplace_spectrum"):
            shape = store.fields[name]
            header = {"descr": np.lib.format.dtype_to_descr(np.dtype(np.float64)),
                      "fortran_order": False, "shape": (s, *shape)}
            with npz_member(zf, name) as fh:
                np.lib.format.write_array_header_1_0(fh, header)
                for i, good in enumerate(ok):
                    row = store.read(name, i) if good else np.full(shape, np.nan)
                    fh.write(np.ascontiguousarray(row, dtype=np.float64).tobytes())
    return Path(path)


def two_groups(manifest: Manifest, rows: list[dict]) -> tuple[str, str] | None:
    """The two group names (manifest order) when the finished subjects form exactly two
    groups of at least two subjects each, else None."""
    groups: dict[str, int] = {}
    for entry, row in zip(manifest.subjects, rows):
        if row["status"] == "ok" and entry.group:
            groups[entry.group] = groups.get(entry.group, 0) + 1
    if len(groups) != 2 or min(groups.values()) < 2:
        return None
    a, b = groups
    return a, b


def covariate_matrix(entries) -> tuple[np.ndarray | None, list[str], list[dict]]:
    """Numeric covariates of the given manifest entries (group A rows, then group B).

    A column is used when every entry has a value and the values vary: numbers
    as they are, two-level text (e.g. sex F/M) coded 0/1 in sorted order.
    Returns ``(matrix or None, names used, dropped)`` with ``dropped`` a list of
    ``{"name", "reason"}`` for every other column.
    """
    names = list(dict.fromkeys(c for e in entries for c in e.covariates))
    cols, used, dropped = [], [], []
    for name in names:
        values = [e.covariates.get(name, "") for e in entries]
        missing = sum(v == "" for v in values)
        if missing:
            dropped.append({"name": name, "reason": f"no value for {missing} of the "
                                                    f"{len(values)} subjects tested"})
            continue
        try:
            col = np.array([float(v) for v in values])
        except ValueError:
            levels = sorted(set(values))
            if len(levels) != 2:
                dropped.append({"name": name, "reason": SAME if len(levels) == 1 else
                                f"text with {len(levels)} different values (numbers or two "
                                "levels needed)"})
                continue
            col = np.array([float(levels.index(v)) for v in values])
        if not np.all(np.isfinite(col)) or np.ptp(col) == 0:
            dropped.append({"name": name, "reason": SAME if np.all(np.isfinite(col))
                            else "not a finite number everywhere"})
            continue
        cols.append(col)
        used.append(name)
    return (np.column_stack(cols) if cols else None), used, dropped


def _fit(a, b, entries, n_permutations: int, seed: int):
    """The group test of ``a - b`` with the usable covariates; without them if they make
    the model unfittable.  Returns (result, covariates used, covariates dropped)."""
    cov, used, dropped = covariate_matrix(entries)
    try:
        res = vertexwise_group_test(a, b, n_permutations=n_permutations, seed=seed,
                                    covariates=cov)
    except ValueError as exc:
        if cov is None:
            raise
        res = vertexwise_group_test(a, b, n_permutations=n_permutations, seed=seed)
        dropped += [{"name": n, "reason": f"the model with the covariates could not be fitted: "
                                          f"{exc}"} for n in used]
        used = []
    return res, used, dropped


def _field_rows(fields, manifest: Manifest, rows: list[dict]):
    """(rows of the normal displacement for a subject mask, ok mask, groups) from a field
    store (lazy Dask rows) or from a ``cohort_fields.npz`` file."""
    if isinstance(fields, FieldStore):
        ok = np.array([r["status"] == "ok" for r in rows]) & fields.written("normal_displacement")
        groups = np.array([e.group for e in manifest.subjects])
        return (lambda mask: fields.dask("normal_displacement", mask)), ok, groups
    with np.load(fields, allow_pickle=False) as data:
        nd, ok, groups = data["normal_displacement"], data["ok"], data["groups"]
    return (lambda mask: nd[mask]), ok, groups


def _column_mean(x) -> np.ndarray:
    mean = x.mean(axis=0)
    return np.asarray(mean.compute() if hasattr(mean, "compute") else mean, dtype=np.float64)


def write_group_test(path, manifest: Manifest, rows: list[dict], fields,
                     *, n_permutations: int, seed: int) -> tuple[Path, dict] | None:
    """``group_test.csv`` (per template vertex: group means, t, p-values, FDR q-values) and
    ``group_test.json`` beside it (groups, contrast, covariates used and dropped).

    Runs :func:`~surfacekit.analysis.stats.vertexwise_group_test` (permutation max-T, Nichols &
    Holmes 2002; FDR, Benjamini & Hochberg 1995) on the normal displacement (mm, + outward),
    adjusted for the manifest covariates usable as numbers (see :func:`covariate_matrix`);
    if they make the design rank deficient the test runs without them and says so.
    Sign convention: the first group in manifest order is the reference, the t column
    is ``t_<second>_minus_<first>`` (t > 0 where the second group lies further outward).
    `fields` is the cohort's :class:`~surfacekit.cohort.store.FieldStore` (read chunk by
    chunk through Dask) or a ``cohort_fields.npz`` file.
    Returns ``(csv path, info)``, or None (and writes nothing) without exactly two groups.
    """
    pair = two_groups(manifest, rows)
    if pair is None:
        return None
    nd, ok, groups = _field_rows(fields, manifest, rows)
    ref, other = pair
    in_ref, in_other = ok & (groups == ref), ok & (groups == other)
    entries = ([e for e, m in zip(manifest.subjects, in_other) if m]
               + [e for e, m in zip(manifest.subjects, in_ref) if m])
    res, used, dropped = _fit(nd(in_other), nd(in_ref), entries, n_permutations, seed)
    t_name = f"t_{other}_minus_{ref}"
    columns = [_column_mean(nd(in_ref)), _column_mean(nd(in_other))] + [
        np.asarray(getattr(res, name), dtype=np.float64)
        for name in ("t", "p_uncorrected", "p_fwer", "q_fdr")]
    header = ["vertex", f"mean_{ref}_outward_mm", f"mean_{other}_outward_mm", t_name, "p_uncorrected",
              "p_fwer", "q_fdr"]
    table = [dict(zip(header, (i, *vals))) for i, vals in enumerate(zip(*columns))]
    info = {"field": "normal_displacement (mm, + outward)", "reference_group": ref,
            "groups": {ref: int(in_ref.sum()), other: int(in_other.sum())},
            "contrast": f"{other} minus {ref}", "t_column": t_name,
            "covariates_used": used, "covariates_dropped": dropped,
            "n_permutations": int(n_permutations), "seed": int(seed),
            "method": res.info["method"]}
    for d in dropped:  # the command line shows each as one warning line
        warnings.warn(f"covariate {d['name']!r} not used in the group test: {d['reason']}",
                      UserWarning, stacklevel=2)
    write_json(Path(path).with_suffix(".json"), info)
    return write_csv(path, table, columns=header), info
