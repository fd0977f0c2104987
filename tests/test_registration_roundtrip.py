"""Round trip through an image toolkit: label volumes -> surfaces -> match -> transform file and
displacement field -> SimpleITK resampling of the baseline labels onto the follow-up grid.

The overlap measure is Dice's coefficient 2|A∩B| / (|A| + |B|) (Dice, "Measures of the amount
of ecologic association between species", Ecology 26, 1945).  The scene (tests/registration_scene.py)
deforms the organ by a known smooth map, so the field is also checked against the truth.
"""
from __future__ import annotations

import json

import numpy as np
import pytest
from registration_scene import LPS_TO_RAS, dice, followup_to_baseline, scene

import surfacekit as sk
from surfacekit.analysis.displacement import correspondence_pairs
from surfacekit.app import cli
from surfacekit.io.images import ImageGrid

sitk = pytest.importorskip("SimpleITK")


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    folder = tmp_path_factory.mktemp("study")
    base_img, follow_img = scene()
    sitk.WriteImage(base_img, str(folder / "baseline.nrrd"))
    sitk.WriteImage(follow_img, str(folder / "followup.mha"))
    base, _ = sk.prepare(sk.from_segmentation(folder / "baseline.nrrd", 1), target_vertices=2500)
    follow, _ = sk.prepare(sk.from_segmentation(folder / "followup.mha", 1), target_vertices=2500)
    sk.save(base, folder / "baseline.ply")
    sk.save(follow, folder / "followup.ply")
    corr = sk.match(base, follow)
    field = sk.displacement_field(corr, folder / "followup.mha", base, follow)
    return {"folder": folder, "base_img": base_img, "follow_img": follow_img, "base": base,
            "follow": follow, "corr": corr, "field": field}


def _resample(moving, fixed, transform):
    return sitk.Resample(moving, fixed, transform, sitk.sitkNearestNeighbor, 0)


def test_field_beats_the_rigid_transform_in_dice(study, tmp_path):
    """Dice >= 0.90 with the follow-up labels, and at least 0.05 above the rigid transform."""
    tfm = sk.save_transform(study["corr"], tmp_path / "rigid.tfm", "rigid")
    rigid = dice(_resample(study["base_img"], study["follow_img"], sitk.ReadTransform(str(tfm))),
                 study["follow_img"])
    warped = _resample(study["base_img"], study["follow_img"],
                       sitk.DisplacementFieldTransform(sitk.Image(study["field"])))
    by_field = dice(warped, study["follow_img"])
    assert by_field >= 0.90
    assert by_field >= rigid + 0.05, (by_field, rigid)


def test_field_is_exact_at_the_follow_up_vertices(study):
    """The warp the field samples interpolates every pair to 1e-6 mm, the image holds its values
    at the voxel centres (LPS vectors), and SimpleITK reads it back as the same map."""
    corr, base, follow = study["corr"], study["base"], study["follow"]
    fixed, moving = correspondence_pairs(corr, base, follow)
    assert len(fixed) == follow.n_vertices
    warp = sk.correspondence_warp(corr, base, follow)
    assert np.abs(fixed + warp(fixed) - moving).max() < 1e-6
    grid = ImageGrid.of(study["follow_img"])
    values = sitk.GetArrayFromImage(study["field"]).reshape(-1, 3)  # ITK order, i fastest
    some = np.random.default_rng(0).choice(len(values), 500, replace=False)
    points = np.concatenate([grid.points(k, k + 1) for k in some])
    assert np.abs(values[some] @ LPS_TO_RAS - warp(points)).max() < 1e-9
    # through SimpleITK's interpolation at the vertices: close, not exact (linear between voxels)
    through = sk.transform_points(study["field"], follow.vertices)
    assert np.median(np.linalg.norm(through - moving, axis=1)) < 0.2


def test_field_follows_the_known_deformation(study):
    """Against the deformation that made the follow-up: where the pole grew, the rigid pose
    leaves errors near the growth (12 mm); the field halves the 95th percentile of the error of
    follow-up vertices against their true baseline points (the median stays near the voxel size:
    sliding along the surface is not fixed by shape alone)."""
    follow, corr = study["follow"], study["corr"]
    truth = followup_to_baseline(follow.vertices)
    by_field = np.linalg.norm(sk.transform_points(study["field"], follow.vertices) - truth, axis=1)
    by_rigid = np.linalg.norm(corr.rigid.inverse().apply(follow.vertices) - truth, axis=1)
    assert np.percentile(by_field, 95) < 0.6 * np.percentile(by_rigid, 95)
    assert np.median(by_field) < 3.0


def test_saved_transform_matches_the_correspondence(study, tmp_path):
    """A point mapped by the saved transform through SimpleITK equals the correspondence's
    mapped point (1e-6 mm), both directions."""
    corr, follow = study["corr"], study["follow"]
    for kind in ("rigid", "similarity", "affine"):
        path = sk.save_transform(corr, tmp_path / f"{kind}.h5", kind)
        tx = sitk.ReadTransform(str(path))
        lps = follow.vertices[:50] @ LPS_TO_RAS
        through = np.array([tx.TransformPoint(tuple(p)) for p in lps]) @ LPS_TO_RAS
        m = np.linalg.inv(sk.analysis.registration.pose_matrix(corr, kind))
        assert np.abs(through - (follow.vertices[:50] @ m[:3, :3].T + m[:3, 3])).max() < 1e-6
    back = sk.apply_transform(follow, tmp_path / "rigid.h5")
    assert np.abs(corr.rigid.apply(back.vertices) - follow.vertices).max() < 1e-6


def test_reference_that_does_not_contain_the_surface(study):
    small = sitk.Image(8, 8, 8, sitk.sitkUInt8)  # 8 mm cube at the origin
    with pytest.raises(sk.SurfaceError, match=r"does not contain the follow-up .* mm outside"):
        sk.displacement_field(study["corr"], small, study["base"], study["follow"])
    with pytest.raises(sk.SurfaceError, match="pass source= and target="):
        sk.displacement_field(study["corr"], study["follow_img"])


def _run(argv, capsys):
    code = cli.main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.mark.parametrize("extra, message", [
    (["--field", "f.nrrd", "--reference", "missing.mha"], "no such reference image"),
    (["--field", "f.nrrd"], "--field needs --reference"),
    (["--field", "f.nrrd", "--reference", "tiny.nrrd"], "does not contain the follow-up"),
    (["--field", "f.nrrd", "--reference", "bad.nrrd"], "cannot read"),
    (["--transform", "t.tfm", "--transform-kind", "bspline"], "invalid choice: 'bspline'"),
    (["--transform", "t.nii.gz"], "must end with one of .tfm"),
])
def test_command_line_bad_input(study, tmp_path, capsys, monkeypatch, extra, message):
    """One line on stderr, exit 2, nothing written (checked before any matching)."""
    monkeypatch.chdir(tmp_path)
    sitk.WriteImage(sitk.Image(4, 4, 4, sitk.sitkUInt8), "tiny.nrrd")
    (tmp_path / "bad.nrrd").write_text("NRRD0004\nnonsense\n")
    before = sorted(p.name for p in tmp_path.iterdir())
    f = study["folder"]
    code, _, err = _run(["match", f / "baseline.ply", f / "followup.ply", "-o", "map.npz",
                         *extra], capsys)
    assert code == 2
    assert message in err and len(err.strip().splitlines()) == 1, err
    assert sorted(p.name for p in tmp_path.iterdir()) == before


@pytest.mark.slow
def test_command_line_writes_transform_and_field(study, tmp_path, capsys):
    f = study["folder"]
    code, out, err = _run(["match", f / "baseline.ply", f / "followup.ply", "-o",
                           tmp_path / "map.npz", "--transform", tmp_path / "pose.tfm",
                           "--transform-kind", "affine", "--field", tmp_path / "field.nii.gz",
                           "--reference", f / "followup.mha", "--json"], capsys)
    assert code == 0, err
    record = json.loads(out)["registration"]
    assert "RAS" in record["world_frame"] and record["kind"] == "affine"
    field = sitk.ReadImage(str(tmp_path / "field.nii.gz"))
    warped = _resample(study["base_img"], study["follow_img"],
                       sitk.DisplacementFieldTransform(sitk.Cast(field, sitk.sitkVectorFloat64)))
    assert dice(warped, study["follow_img"]) >= 0.90
    assert sitk.ReadTransform(str(tmp_path / "pose.tfm")).GetName() == "AffineTransform"


def test_a_comparison_carries_its_surfaces(study):
    """sk.displacement_field(comparison, reference) reuses the comparison's surfaces and change
    analysis, and gives the field made from the same match with the surfaces passed by hand."""
    base, follow, corr = study["base"], study["follow"], study["corr"]
    comparison = sk.compare(base, follow, correspondence=corr)
    field = sk.displacement_field(comparison, study["follow_img"])
    a = sitk.GetArrayFromImage(field)
    b = sitk.GetArrayFromImage(study["field"])
    assert np.abs(a - b).max() < 1e-9


@pytest.mark.slow
def test_the_worked_example_runs(tmp_path):
    import subprocess
    import sys
    from pathlib import Path

    example = Path(__file__).resolve().parents[1] / "examples" / "registration_step.py"
    done = subprocess.run([sys.executable, str(example)], check=False, cwd=tmp_path,
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    lines = {ln.split(":")[0].strip(): ln for ln in done.stdout.splitlines()}
    field = float(lines["Dice, displacement field"].split()[-1])
    rigid = float(lines["Dice, rigid transform"].split()[-1])
    assert field >= 0.90 and field >= rigid + 0.05
    assert (tmp_path / "registration-step" / "field.nrrd").is_file()
