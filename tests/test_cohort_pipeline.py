"""The per-subject cohort work (surfacekit/cohort/subject.py, run.py): one eigenproblem per
surface, the change metrics of the one comparison pipeline, MatchOptions in the cache key."""
from __future__ import annotations

import json

import numpy as np
import pytest

import surfacekit as sk
from surfacekit.analysis.workflow import compare
from surfacekit.cohort import subject as cohort_subject
from surfacekit.cohort.subject import load_input_surface, prepare_surface
from surfacekit.io.tables import format_value
from surfacekit.mesh import eigen

N_VERTICES = 700
OPTIONS = {"target_vertices": N_VERTICES, "n_eigenvalues": 20, "n_permutations": 50,
           "progress": False}


def _bulge(q, p):
    """A local outward bulge of up to 3 mm on one pole."""
    return q + 3.0 * np.exp(-((p[:, 0] - 1) ** 2 + p[:, 1] ** 2 + p[:, 2] ** 2) / 0.3)[:, None] * p


@pytest.fixture(scope="module")
def tiny_cohort(tmp_path_factory):
    """A template and three subjects: a rigid copy, another triangulation, a bulged kidney."""
    folder = tmp_path_factory.mktemp("tiny")
    template, _ = sk.synthetic.organ_surface("kidney", N_VERTICES, seed=100)
    sk.save(template, folder / "template.ply")
    copy = sk.Surface(template.vertices @ sk.synthetic.random_rotation(3).T + [5.0, 0.0, 1.0],
                      template.faces)
    sk.save(copy, folder / "copy.ply")
    for name, seed, deform in (("other", 1, None), ("bulged", 2, _bulge)):
        s, _ = sk.synthetic.organ_surface("kidney", N_VERTICES, seed=seed, deform=deform)
        sk.save(s, folder / f"{name}.ply")
    manifest = folder / "cohort.csv"
    manifest.write_text("subject,path,label,group,role,age,sex\n"
                        "atlas,template.ply,,,template,,\n"
                        "copy,copy.ply,,a,subject,50,F\n"
                        "other,other.ply,,b,subject,60,M\n"
                        "bulged,bulged.ply,,b,subject,55,F\n")
    return manifest


def _counting_solver(monkeypatch, *, fresh_process: bool = True) -> list:
    """Count the real eigen-solves (each call of the one solver function)."""
    calls: list[int] = []
    solve = eigen.solve_eigenbasis

    def counted(L, M, k, solver):
        calls.append(int(k))
        return solve(L, M, k, solver)

    monkeypatch.setattr(eigen, "solve_eigenbasis", counted)
    if fresh_process:  # no template kept from an earlier run in this process
        monkeypatch.setattr(cohort_subject, "_TEMPLATE_CACHE", {})
    return calls


def test_each_surface_solves_one_eigenproblem(tiny_cohort, tmp_path, monkeypatch):
    """In-process engine: one solve per subject plus the template's own, once; a re-run
    of finished subjects solves nothing."""
    calls = _counting_solver(monkeypatch)
    result = sk.run_cohort(tiny_cohort, tmp_path / "out", workers=1, **OPTIONS)
    assert result.n_failed == 0 and result.n_computed == 3
    assert len(calls) == 3 + 1, calls
    # the one basis serves the matching (60 pairs) and the spectrum (20 + 1 pairs)
    assert set(calls) == {sk.MatchOptions().n_eigen}
    calls.clear()
    again = sk.run_cohort(tiny_cohort, tmp_path / "out", workers=1, **OPTIONS)
    assert again.n_cached == 3 and calls == []


@pytest.mark.slow
def test_table_metric_is_the_change_summary_metric(tiny_cohort, tmp_path):
    """The cohort row of a subject holds the change summary's own (area-weighted) values."""
    out = tmp_path / "out"
    result = sk.run_cohort(tiny_cohort, out, workers=1, seed=3, **OPTIONS)
    row = {r["subject"]: r for r in result.rows}["bulged"]["values"]
    with np.load(out / "template" / "template.npz") as data:
        template = sk.Surface(data["vertices"], data["faces"])
    raw = load_input_surface(tiny_cohort.parent / "bulged.ply", None)
    subject = prepare_surface(raw, {"target_vertices": N_VERTICES})
    summary = compare(template, subject, seed=3).change.summary()
    for column, name in (("mean_abs_normal_displacement_mm",) * 2,
                         ("max_abs_normal_displacement_mm",) * 2,
                         ("mean_log_area_ratio_subject_over_template",
                          "mean_log_area_ratio_followup_over_baseline")):
        assert row[column] == summary[name], column
    table = (out / "cohort_summary.csv").read_text().splitlines()
    header = table[0].split(",")
    line = next(t.split(",") for t in table[1:] if t.startswith("bulged,"))
    column = header.index("mean_abs_normal_displacement_mm")
    assert line[column] == format_value(summary["mean_abs_normal_displacement_mm"])
    # area-weighted with the template's vertex areas, which here differs from a vertex mean
    nd = sk.load_fields(out / "subjects" / "bulged" / "fields.npz")["normal_displacement"]
    areas = template.vertex_areas
    weighted = float(areas @ np.abs(nd) / areas.sum())
    assert row["mean_abs_normal_displacement_mm"] == pytest.approx(weighted, rel=1e-12)
    assert abs(weighted - np.abs(nd).mean()) > 1e-6 * weighted


@pytest.mark.slow
def test_match_options_reach_the_worker_and_the_cache_key(tiny_cohort, tmp_path, monkeypatch):
    """Changed MatchOptions recompute every subject, reach each comparison, and are recorded;
    the template kept in this process is solved again for the new basis size, as a fresh
    worker process would."""
    out = tmp_path / "out"
    sk.run_cohort(tiny_cohort, out, workers=1, **OPTIONS)
    calls = _counting_solver(monkeypatch, fresh_process=False)
    seen = []

    def spy(*args, **kwargs):
        seen.append(kwargs["options"])
        return compare(*args, **kwargs)

    monkeypatch.setattr(cohort_subject, "compare", spy)
    options = sk.MatchOptions(n_eigen=40, n_poses=2)
    changed = sk.run_cohort(tiny_cohort, out, workers=1, match_options=options, **OPTIONS)
    assert changed.n_computed == 3 and changed.n_failed == 0
    assert seen == [options] * 3
    assert calls == [40] * (3 + 1)
    provenance = json.loads((out / "run_summary.json").read_text())["options"]
    assert provenance["match"] == options.to_dict()
    seen.clear()
    same = sk.run_cohort(tiny_cohort, out, workers=1, match_options=options, **OPTIONS)
    assert same.n_cached == 3 and seen == []
    with pytest.raises(ValueError, match="MatchOptions"):
        sk.run_cohort(tiny_cohort, out, match_options={"n_eigen": 40}, **OPTIONS)


def test_covariate_column_named_like_a_result_column_is_refused(tiny_cohort, tmp_path):
    manifest = tmp_path / "m.csv"
    lines = tiny_cohort.read_text().splitlines()
    manifest.write_text("\n".join([lines[0] + ",volume_ml"] + [x + ",1" for x in lines[1:]]) + "\n")
    with pytest.raises(ValueError, match="volume_ml"):
        sk.run_cohort(manifest, tmp_path / "out", **OPTIONS)
