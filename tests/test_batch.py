"""Cohort runs (surfacekit/cohort/): manifest, cache and resume, failure rows, engines.

The small synthetic cohort (labelled synthetic, ~1.5k vertices per surface):
the template (a kidney-like surface), a rigidly moved copy of it, a uniformly
scaled (x1.1) and rotated copy, two differently triangulated and deformed
kidneys, a corrupt PLY file and a label volume whose manifest label is absent.
Engine checks compare against the in-process run: the CSV tables must be
byte-identical serially, with 2 local workers, and on a Dask scheduler plus
workers started on loopback.
"""
from __future__ import annotations

import filecmp
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

import surfacekit as sk
from surfacekit.cohort.engines import loopback_cluster
from surfacekit.cohort.manifest import cache_key, read_manifest
from surfacekit.cohort.tables import covariate_matrix
from surfacekit.io.tables import format_value

N_VERTICES = 1500
TABLES = ("cohort_summary.csv", "group_test.csv", "group_test.json")
RUN_OPTIONS = {"target_vertices": N_VERTICES, "n_permutations": 200, "n_eigenvalues": 30,
               "progress": False}
SCALE = 1.1


def _write_cohort(folder: Path) -> Path:
    """Synthetic demo-like cohort; returns the manifest path."""
    import nibabel as nib

    folder.mkdir(parents=True, exist_ok=True)
    template, _ = sk.synthetic.organ_surface("kidney", N_VERTICES, seed=100)
    sk.save(template, folder / "template.ply")
    rot = sk.synthetic.random_rotation(3)
    copy = sk.Surface(template.vertices @ rot.T + [10.0, -4.0, 2.0], template.faces)
    sk.save(copy, folder / "copy.ply")
    scaled = sk.Surface(SCALE * template.vertices @ sk.synthetic.random_rotation(4).T,
                        template.faces)
    sk.save(scaled, folder / "scaled.ply")

    def bulge(q, p):  # a local outward bulge of up to 4 mm on one pole
        return q + 4.0 * np.exp(-((p[:, 0] - 1) ** 2 + p[:, 1] ** 2 + p[:, 2] ** 2) / 0.3)[:, None] * p

    for name, seed, deform in (("k1", 1, None), ("k2", 2, bulge)):
        s, _ = sk.synthetic.organ_surface("kidney", N_VERTICES, seed=seed, deform=deform)
        sk.save(s, folder / f"{name}.ply")
    (folder / "broken.ply").write_bytes(b"ply\nformat binary_little_endian 1.0\n\x00\x13garbage")
    vol = np.zeros((8, 8, 8), dtype=np.uint8)
    vol[2:6, 2:6, 2:6] = 1
    nib.save(nib.Nifti1Image(vol, np.eye(4)), str(folder / "mask.nii.gz"))
    rows = ["subject,path,label,group,role,age,sex",
            "atlas,template.ply,,,template,,",
            "copy,copy.ply,,control,subject,61,F",
            "scaled,scaled.ply,,case,subject,58,F",
            "broken,broken.ply,,case,subject,70,F",
            "k1,k1.ply,,control,subject,49,F",
            "nolabel,mask.nii.gz,7,control,subject,52,F",
            "k2,k2.ply,,case,subject,66,F"]
    manifest = folder / "demo_cohort.csv"
    manifest.write_text("\n".join(rows) + "\n")
    return manifest


@pytest.fixture(scope="module")
def cohort(tmp_path_factory):
    """The manifest and one in-process reference run (computed once per module)."""
    root = tmp_path_factory.mktemp("cohort")
    manifest = _write_cohort(root / "data")
    result = sk.run_cohort(manifest, root / "serial", workers=1, **RUN_OPTIONS)
    return manifest, result


def _same_tables(a: Path, b: Path) -> None:
    for name in TABLES:
        assert filecmp.cmp(a / name, b / name, shallow=False), f"{name} differs"
    with np.load(a / "cohort_fields.npz") as fa, np.load(b / "cohort_fields.npz") as fb:
        assert sorted(fa.files) == sorted(fb.files)
        for key in fa.files:
            np.testing.assert_array_equal(fa[key], fb[key])


# ----------------------------------------------------------------------- manifest


def test_manifest_parsing_and_errors(tmp_path):
    """The manifest format of surfacekit.cohort.manifest: header required, one template row,
    paths relative to the manifest, integer labels, safe and unique ids."""
    (tmp_path / "t.ply").write_text("x")
    good = tmp_path / "m.csv"
    good.write_text("subject,path,label,group,role,age,sex,site\n"
                    "tpl,t.ply,,,template,,,\n"
                    "a,sub/a.nii.gz,3,g1,subject,40,F,north\n"
                    "b,/abs/b.ply,,g2,,41,M,south\n")
    man = read_manifest(good)
    assert [e.subject for e in man.subjects] == ["a", "b"]
    assert man.template.path == tmp_path / "t.ply"
    assert man.subjects[0].path == tmp_path / "sub" / "a.nii.gz" and man.subjects[0].is_volume
    assert man.subjects[0].label == 3 and man.subjects[1].label is None
    assert man.covariate_names == ("age", "sex", "site") and man.groups == ["g1", "g2"]
    # --template overrides (and makes optional) the template row
    assert read_manifest(good, template=tmp_path / "t.ply").template.path == tmp_path / "t.ply"

    header = "subject,path,label,group,role,age,sex\n"
    bad = {
        "lacks column": "subject,path,group,role\ntpl,t.ply,,template\n",
        "no row with role 'template'": header + "a,a.ply,,g,subject,,\n",
        "2 template rows": header + "t1,t.ply,,,template,,\nt2,t.ply,,,template,,\n"
                                    "a,a.ply,,g,subject,,\n",
        "appears twice": header + "t,t.ply,,,template,,\na,a.ply,,g,subject,,\n"
                                  "a,b.ply,,g,subject,,\n",
        "must be letters": header + "t,t.ply,,,template,,\n../x,a.ply,,g,subject,,\n",
        "not an integer": header + "t,t.ply,,,template,,\na,a.nii,1.5,g,subject,,\n",
        "neither": header + "t,t.ply,,,template,,\na,a.ply,,g,control,,\n",
        "lists no subjects": header + "t,t.ply,,,template,,\n",
    }
    for message, text in bad.items():
        path = tmp_path / "bad.csv"
        path.write_text(text)
        with pytest.raises(ValueError, match=message):
            read_manifest(path)
    with pytest.raises(ValueError, match="manifest not found"):
        read_manifest(tmp_path / "missing.csv")
    with pytest.raises(ValueError, match="template not found"):
        read_manifest(good, template=tmp_path / "nope.ply")


def test_cache_key_and_formatting():
    """A changed input, label, template, option or version gives a new key; floats print
    with a fixed 6 significant digits (C printf %g rule, common practice)."""
    base = {"input_digest": "ab", "label": None, "template_key": "t",
            "options": {"target_vertices": 1500, "seed": 0}, "version": "0.1.0"}
    key = cache_key(**base)
    assert key == cache_key(**dict(base)) and len(key) == 24
    for change in ({"input_digest": "ac"}, {"label": 2}, {"template_key": "u"},
                   {"options": {"target_vertices": 1600, "seed": 0}}, {"version": "0.2.0"}):
        assert cache_key(**{**base, **change}) != key
    assert [format_value(v) for v in (0.1 + 0.2, 1e-12, -0.0, float("nan"), None, 3, True)] == \
        ["0.3", "1e-12", "0", "", "", "3", "1"]


def test_covariates_coded_for_the_group_test():
    """Numbers kept, two-level text coded 0/1 (sorted), constant or incomplete columns
    dropped with the reason."""
    from surfacekit.cohort.manifest import ManifestEntry

    entries = [ManifestEntry("a", Path("a"), covariates={"age": "40", "sex": "M", "site": "x"}),
               ManifestEntry("b", Path("b"), covariates={"age": "50", "sex": "F", "site": "x"}),
               ManifestEntry("c", Path("c"), covariates={"age": "45", "sex": "M", "site": ""})]
    matrix, used, dropped = covariate_matrix(entries)
    assert used == ["age", "sex"]
    np.testing.assert_array_equal(matrix, [[40, 1], [50, 0], [45, 1]])
    assert dropped == [{"name": "site", "reason": "no value for 1 of the 3 subjects tested"}]
    _, used, dropped = covariate_matrix(entries[:2])
    assert used == ["age", "sex"] and dropped[0]["reason"] == "the same value for every subject tested"


# ----------------------------------------------------------------- one cohort run


@pytest.mark.slow
def test_cohort_rows_failures_and_reference_values(cohort):
    """Failure rows carry a one-line error while the other subjects complete; values
    checked against references outside the batch code."""
    _manifest, result = cohort
    out = result.output_dir
    assert result.n_subjects == 6 and result.n_failed == 2 and result.n_computed == 6
    failed = dict(result.failed)
    assert set(failed) == {"broken", "nolabel"}
    assert all("\n" not in e and e for e in failed.values())
    assert "7" in failed["nolabel"]                 # the missing label is named
    lines = (out / "cohort_summary.csv").read_text().splitlines()
    assert [line.split(",")[0] for line in lines[1:]] == \
        ["copy", "scaled", "broken", "k1", "nolabel", "k2"]           # manifest order
    rows = {r["subject"]: r for r in result.rows}
    assert rows["broken"]["status"] == "failed" and rows["k2"]["status"] == "ok"

    template = sk.load(out / "template" / "template.ply")
    # Volumes: the enclosed volume of the stored prepared mesh computed by trimesh
    # (an independent reference implementation of the divergence-theorem volume).
    for name in ("copy", "scaled", "k1", "k2"):
        mesh = sk.load(out / "subjects" / name / "prepared.ply").to_trimesh()
        assert rows[name]["values"]["volume_ml"] == pytest.approx(mesh.volume / 1000, rel=1e-5)
    # Uniform scaling by s multiplies volume by s³ (definition); a rigid copy keeps it.
    v_template = template.volume / 1000
    assert rows["scaled"]["values"]["volume_ml"] == pytest.approx(SCALE ** 3 * v_template, rel=0.01)
    assert rows["copy"]["values"]["volume_ml"] == pytest.approx(v_template, rel=0.005)
    # Laplace spectrum is invariant to rigid motion and uniform scaling (Reuter, Wolter &
    # Peinecke 2006), so both copies lie at ~0 spectral distance from the template,
    # far below a differently deformed kidney.
    d = {n: rows[n]["values"]["spectral_distance"] for n in ("copy", "scaled", "k2")}
    assert d["copy"] < 0.01 * d["k2"] + 1e-6 and d["scaled"] < 0.05 * d["k2"]
    # A rigid copy does not change shape: normal displacement ~0 (well under 1% of the
    # template size), after the rigid motion is removed.
    size = float(np.cbrt(template.volume))
    assert rows["copy"]["values"]["mean_abs_normal_displacement_mm"] < 0.01 * size

    fields = sk.load_fields(out / "cohort_fields.npz")
    assert list(fields["subjects"]) == ["copy", "scaled", "broken", "k1", "nolabel", "k2"]
    assert fields["normal_displacement"].shape == (6, template.n_vertices)
    assert np.isnan(fields["normal_displacement"][2]).all() and not fields["ok"][2]
    per_subject = sk.load_fields(out / "subjects" / "k2" / "fields.npz")
    np.testing.assert_array_equal(fields["normal_displacement"][5],
                                  per_subject["normal_displacement"])
    viewable, on_template = sk.io.load_with_fields(out / "subjects" / "k2" / "on_template.ply")
    assert viewable.n_vertices == template.n_vertices
    np.testing.assert_allclose(on_template["normal_displacement"],
                               per_subject["normal_displacement"], rtol=1e-6, atol=1e-6)  # float32

    # group_test.csv: t of case minus control (control is first in the manifest) adjusted
    # for age (sex is constant, dropped and recorded),
    # checked against an ordinary least-squares fit (textbook t = b / se(b), e.g.
    # Seber & Lee, Linear Regression Analysis, 2003) computed here with numpy.
    table = np.genfromtxt(out / "group_test.csv", delimiter=",", names=True)
    ok = fields["ok"]
    groups = fields["groups"]
    order = np.r_[np.flatnonzero(ok & (groups == "control")), np.flatnonzero(ok & (groups == "case"))]
    y = fields["normal_displacement"][order]
    age = np.array([61, 49, 58, 66], dtype=float)        # copy, k1 | scaled, k2
    x = np.column_stack([[0, 0, 1, 1], np.ones(4), age])
    beta, *_ = np.linalg.lstsq(x, y, rcond=None)
    resid = y - x @ beta
    sigma2 = (resid ** 2).sum(axis=0) / (4 - 3)
    t = beta[0] / np.sqrt(sigma2 * np.linalg.inv(x.T @ x)[0, 0])
    finite = np.isfinite(t) & (np.abs(t) < 1e6)
    np.testing.assert_allclose(table["t_case_minus_control"][finite], t[finite], rtol=2e-5,
                               atol=1e-5)
    info = json.loads((out / "group_test.json").read_text())
    assert info == {**info, "contrast": "case minus control", "reference_group": "control",
                    "covariates_used": ["age"], "groups": {"control": 2, "case": 2}}
    assert [d["name"] for d in info["covariates_dropped"]] == ["sex"]
    assert json.loads((out / "run_summary.json").read_text())["group_test"] == info
    assert "covariates used: age; not used: sex" in result.summary()
    assert np.all((table["p_fwer"] > 0) & (table["p_fwer"] <= 1))


@pytest.mark.slow
def test_rerun_skips_finished_and_changed_input_recomputes(cohort, tmp_path):
    """A re-run reuses every finished subject; a changed input file recomputes only that
    subject (its cache key covers the input bytes); failed subjects are retried."""
    manifest, reference = cohort
    data = tmp_path / "data"
    shutil.copytree(manifest.parent, data)
    out = tmp_path / "out"
    shutil.copytree(reference.output_dir, out)
    again = sk.run_cohort(data / manifest.name, out, **RUN_OPTIONS)
    assert again.n_cached == 4 and again.n_computed == 2 and again.n_failed == 2
    for name in TABLES:  # error messages name the (moved) input folder; all else is equal
        moved = (out / name).read_text().replace(str(data), str(manifest.parent))
        assert moved == (reference.output_dir / name).read_text(), f"{name} differs"

    s, _ = sk.synthetic.organ_surface("kidney", N_VERTICES, seed=7)
    sk.save(s, data / "k1.ply")
    marker = next((out / "subjects" / "copy").glob("*.done"))
    before = marker.stat().st_mtime_ns
    changed = sk.run_cohort(data / manifest.name, out, **RUN_OPTIONS)
    assert changed.n_cached == 3 and changed.n_computed == 3
    assert [r["subject"] for r in changed.rows if r["status"] == "ok" and not r["cached"]] == ["k1"]
    assert marker.stat().st_mtime_ns == before
    assert len(list((out / "subjects" / "k1").glob("*.done"))) == 1   # stale marker removed


# ------------------------------------------------------------------------ engines


@pytest.mark.slow
def test_two_local_workers_give_identical_tables(cohort, tmp_path):
    manifest, reference = cohort
    result = sk.run_cohort(manifest, tmp_path / "pool", workers=2, **RUN_OPTIONS)
    assert result.engine == "processes:2" and result.n_failed == 2
    assert len(result.peak_rss_mb) >= 2    # both worker processes did work
    _same_tables(reference.output_dir, tmp_path / "pool")


def _start(cmd: list[str], log: Path) -> subprocess.Popen:
    with open(log, "wb") as fh:
        return subprocess.Popen(cmd, stdout=fh, stderr=subprocess.STDOUT, start_new_session=True)


@pytest.mark.slow
def test_dask_scheduler_and_workers_on_loopback_give_identical_tables(cohort, tmp_path):
    """A Dask scheduler plus two single-threaded workers, started as processes on 127.0.0.1."""
    pytest.importorskip("distributed", reason="dask[distributed] not installed "
                        "(pip install 'surfacekit[cluster]')")
    manifest, reference = cohort
    with loopback_cluster(2, log_dir=tmp_path) as address:
        result = sk.run_cohort(manifest, tmp_path / "dask", scheduler=address, **RUN_OPTIONS)
    assert result.engine == f"dask:{address}" and result.n_failed == 2
    _same_tables(reference.output_dir, tmp_path / "dask")


@pytest.mark.slow
def test_killed_run_resumes_without_recomputing_finished_subjects(cohort, tmp_path):
    """SIGKILL a run once two subjects are done; the restart reuses exactly the subjects
    whose completion markers exist (untouched) and ends with the clean run's tables."""
    manifest, reference = cohort
    out = tmp_path / "killed"
    code = ("import surfacekit as sk, sys; sk.run_cohort(sys.argv[1], sys.argv[2], "
            f"workers=1, **{RUN_OPTIONS!r})")
    proc = _start([sys.executable, "-c", code, str(manifest), str(out)], tmp_path / "run.log")
    try:
        deadline = time.monotonic() + 300
        while len(list(out.glob("subjects/*/*.done"))) < 2:
            assert proc.poll() is None, (tmp_path / "run.log").read_text()[-2000:]
            assert time.monotonic() < deadline, "no two subjects finished in 300 s"
            time.sleep(0.05)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=30)
    markers = {p: p.stat().st_mtime_ns for p in out.glob("subjects/*/*.done")}
    finished = {p.parent.name for p in markers}
    assert 2 <= len(finished) < 4 and not (out / "cohort_summary.csv").exists()
    resumed = sk.run_cohort(manifest, out, **RUN_OPTIONS)
    assert {r["subject"] for r in resumed.rows if r["cached"]} == finished
    assert resumed.n_cached == len(finished)
    assert all(p.stat().st_mtime_ns == t for p, t in markers.items())
    _same_tables(reference.output_dir, out)
