"""The demo scenario (invented, synthetic) and ``surfacekit demo`` end to end."""
from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import surfacekit as sk
from surfacekit.app import demo_data


def _command() -> list[str]:
    exe = Path(sys.executable).with_name("surfacekit")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "surfacekit.app.cli"]


def _files(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*"))
            if p.is_file()}


def test_scenario_is_deterministic_and_consistent(tmp_path):
    a = demo_data.write_scenario(tmp_path / "a", "small")
    demo_data.write_scenario(tmp_path / "b", "small")
    fa, fb = _files(tmp_path / "a"), _files(tmp_path / "b")
    assert fa == fb  # byte-identical: PLY, NIfTI (gzip mtime 0), CSV
    sizes = a["sizes"]
    # label volume: voxel count x voxel volume ≈ enclosed volume of the same shape (common practice)
    img = nib.load(a["paths"]["followup_seg"])
    labels = np.asarray(img.dataobj)
    voxel_ml = float(np.prod(img.header.get_zooms()[:3])) / 1000.0
    np.testing.assert_allclose(img.header.get_zooms()[:3], sizes.voxel, rtol=1e-6)
    mesh = sk.load(a["paths"]["followup"])
    assert abs((labels == 1).sum() * voxel_ml - mesh.volume / 1000.0) < 0.02 * mesh.volume / 1000.0
    assert set(np.unique(labels)) == {0, 1, 2}
    # the follow-up is the grown kidney: larger than the baseline by about the built-in change
    base = sk.load(a["paths"]["baseline"])
    assert (mesh.n_vertices, base.n_vertices) == (sizes.followup, sizes.baseline)
    dv = (mesh.volume - base.volume) / 1000.0
    assert abs(dv - a["truth"]["true_volume_change_ml"]) < 0.35 * a["truth"]["true_volume_change_ml"]
    # the template carries four regions as a per-vertex PLY field
    _, fields = sk.io.load_with_fields(a["paths"]["template"])
    assert sorted(np.unique(fields["region"]).astype(int)) == [1, 2, 3, 4]
    # the manifest has the columns the cohort reader takes (surfacekit.cohort.manifest)
    with open(a["paths"]["manifest"], newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0]) == ["subject", "path", "label", "group", "role", "age", "sex"]
    assert [r["role"] for r in rows].count("template") == 1
    groups = [r["group"] for r in rows if r["role"] == "subject"]
    assert groups.count("control") == groups.count("growth") == sizes.n_subjects // 2
    for r in rows:
        assert (a["paths"]["manifest"].parent / r["path"]).is_file()
    assert "synthetic" in a["paths"]["readme"].read_text().lower()


def test_regions_and_bulge():
    """Region labels partition the sphere; the bulge moves vertices outward by at most its amplitude."""
    s, sp = sk.synthetic.organ_surface("kidney", 800, seed=4)
    lab = demo_data.regions(sp)
    assert set(np.unique(lab)) == {1, 2, 3, 4}
    grown = demo_data.bulge(s, sp, 4.5)
    moved = np.einsum("ij,ij->i", grown.vertices - s.vertices, s.vertex_normals)
    assert moved.min() >= -1e-12 and abs(moved.max() - 4.5) < 0.2
    assert grown.volume > s.volume


@pytest.mark.slow
@pytest.mark.timeout(1800)
def test_full_demo_from_an_empty_folder(tmp_path):
    """`surfacekit demo` leaves the report, figures, meshes and a manifest `cohort` accepts."""
    env = {**os.environ, "PYTHONWARNINGS": "ignore"}
    run = subprocess.run(_command() + ["demo", "--json"], cwd=tmp_path, capture_output=True,
                         text=True, timeout=1200, env=env, check=False)
    assert run.returncode == 0, run.stderr[-2000:]
    summary = json.loads(run.stdout)
    out = tmp_path / "surfacekit-demo"
    assert (out / "report.html").stat().st_size > 1_000_000  # plotly.js is inline
    assert len(list((out / "figures").glob("*.png"))) >= 4
    for name in ("results/followup_from_segmentation.ply", "results/baseline_change.ply",
                 "results/map.npz", "results/change.csv",
                 "results/cohort/group_test.csv", "data/demo_cohort.csv"):
        assert (out / name).is_file(), name
    assert "Traceback" not in run.stderr and "\r" not in run.stderr  # no bars off a terminal
    # the built-in truth of the scenario is recovered
    true_dv = summary["true volume change (ml, built into the scenario)"]
    assert abs(summary["measured volume change (ml)"] - true_dv) < 0.3 * true_dv
    assert summary["map error vs ground truth, mean (geodesic / sqrt(area))"] < 0.05
    with open(out / "results" / "change.csv", newline="") as fh:
        regions = {r["name"]: r for r in csv.DictReader(fh)}
    p95 = next(k for k in next(iter(regions.values())) if "p95" in k and "normal" in k)
    grown = max(regions, key=lambda n: float(regions[n][p95]))
    assert grown == "upper pole"  # where the scenario put the growth
    # done criterion: match two demo meshes from the command line
    m = subprocess.run(_command() + ["match", "surfacekit-demo/data/kidney_baseline.ply",
                                     "surfacekit-demo/data/kidney_followup.ply", "-o", "out.npz",
                                     "-q"], cwd=tmp_path, capture_output=True, text=True,
                       timeout=600, check=False)
    assert m.returncode == 0, m.stderr
    assert sk.Correspondence.load(tmp_path / "out.npz").source_to_target.shape == (3000,)
    # the manifest the demo wrote is accepted by `surfacekit cohort` (a 2 + 2 subset, for time)
    with open(out / "data" / "demo_cohort.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    keep = [r for r in rows if r["role"] == "template"] + \
        [r for r in rows if r["group"] == "control"][:2] + [r for r in rows if r["group"] == "growth"][:2]
    subset = out / "data" / "subset_cohort.csv"
    with open(subset, "w", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=list(rows[0]), lineterminator="\n")
        w.writeheader()
        w.writerows(keep)
    c = subprocess.run(_command() + ["cohort", str(subset), "-o", "cohort_out", "--permutations",
                                     "50", "--target-vertices", "1500", "--json", "-q"],
                       cwd=tmp_path, capture_output=True, text=True, timeout=900,
                       check=False)
    assert c.returncode == 0, c.stderr
    assert json.loads(c.stdout)["subjects"] == 4
    assert (tmp_path / "cohort_out" / "group_test.csv").is_file()


def test_shipped_sample_files_match_the_generator(tmp_path):
    """sample_meshes/demo holds the full scenario exactly as `surfacekit demo` regenerates it."""
    shipped = Path(__file__).resolve().parent.parent / "sample_meshes" / "demo"
    fresh = demo_data.write_scenario(tmp_path, "full")["paths"]
    for name in ("kidney_baseline.ply", "kidney_followup.ply", "cohort/subject_01.ply",
                 "cohort/subject_16.ply"):
        a, b = sk.load(shipped / name), sk.load(tmp_path / name)
        np.testing.assert_array_equal(a.faces, b.faces)
        np.testing.assert_allclose(a.vertices, b.vertices, atol=1e-9)
    _, fa = sk.io.load_with_fields(shipped / "kidney_template.ply")
    _, fb = sk.io.load_with_fields(fresh["template"])
    np.testing.assert_array_equal(fa["region"], fb["region"])
    vol_a = np.asarray(nib.load(shipped / "kidney_followup_seg.nii.gz").dataobj)
    vol_b = np.asarray(nib.load(fresh["followup_seg"]).dataobj)
    assert (vol_a != vol_b).sum() <= 10  # a voxel centre exactly on the surface may flip
    assert (shipped / "demo_cohort.csv").read_text() == fresh["manifest"].read_text()
    assert (shipped / "kidney_template.ply.regions.csv").read_text() == \
        fresh["template_names"].read_text()
