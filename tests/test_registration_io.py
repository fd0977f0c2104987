"""Label volumes in NIfTI, NRRD and MetaImage, the RAS/LPS world-frame convention, ITK transform
files in and out, and the one-line errors of the image-registration bridge (no matching here)."""
from __future__ import annotations

import builtins

import numpy as np
import pytest
from registration_scene import LPS_TO_RAS, OBLIQUE, grid, grid_points_ras, sitk_labels

import surfacekit as sk
from surfacekit.analysis.registration import pose_matrix
from surfacekit.io.images import ImageGrid
from surfacekit.mesh.surface import SurfaceError

sitk = pytest.importorskip("SimpleITK")

#: the ball's centre in RAS mm, away from every axis so a flipped x or y shows
CENTRE_RAS = np.array([11.0, -13.0, 6.0])


def _ball_grid():
    """Oblique, flipped grid whose voxel-to-world matrix is exact in 32-bit floats (entries k/16),
    so the NIfTI-1 header (float32 sform) stores it without rounding."""
    flip = np.diag([1.0, -1.0, 1.0])
    return grid(OBLIQUE @ flip, (1.5625, 1.5625, 3.125), (40, 40, 24), (8.0, -8.0, 4.0))


@pytest.fixture(scope="module")
def ball_files(tmp_path_factory):
    """The same label volume written as NIfTI (by nibabel, from the exact RAS affine), NRRD and
    MetaImage (.mha and .mhd+.raw, by SimpleITK), and as NIfTI by SimpleITK."""
    import nibabel as nib

    g = _ball_grid()
    inside = np.sum((grid_points_ras(g) - CENTRE_RAS) ** 2, axis=1) <= 12.0 ** 2
    image = sitk_labels(g, inside.astype(np.uint8) * 3)
    folder = tmp_path_factory.mktemp("ball")
    paths = {}
    for suffix in (".nrrd", ".mha", ".mhd"):
        paths[suffix] = folder / f"ball{suffix}"
        sitk.WriteImage(image, str(paths[suffix]))
    paths[".nii.gz"] = folder / "ball.nii.gz"
    volume = sitk.GetArrayFromImage(image).transpose(2, 1, 0)
    nib.save(nib.Nifti1Image(volume, _ras_affine(g)), str(paths[".nii.gz"]))
    paths["itk.nii.gz"] = folder / "ball_itk.nii.gz"
    sitk.WriteImage(image, str(paths["itk.nii.gz"]))
    return image, paths, g


def _ras_affine(g) -> np.ndarray:
    """ITK's index-to-point rule (ITK Software Guide, "Image": origin + D diag(spacing) index),
    in LPS, negated in x and y to RAS."""
    out = np.eye(4)
    out[:3, :3] = LPS_TO_RAS @ g["direction"] @ np.diag(g["spacing"])
    out[:3, 3] = LPS_TO_RAS @ g["origin"]
    return out


def test_every_format_gives_the_same_surface(ball_files):
    """NIfTI (nibabel), NRRD, MetaImage and the SimpleITK object give one surface to 1e-6 mm."""
    image, paths, _ = ball_files
    reference = sk.from_segmentation(paths[".nii.gz"], 3)
    for source in (paths[".nrrd"], paths[".mha"], paths[".mhd"], image,
                   sitk.ReadImage(str(paths[".nii.gz"]))):
        s = sk.from_segmentation(source, 3)
        assert s.faces.tolist() == reference.faces.tolist()
        assert np.abs(s.vertices - reference.vertices).max() < 1e-6
    # SimpleITK's own NIfTI writer rounds the oblique matrix through 32-bit header fields
    # (NIfTI-1 stores srow_x..z and the quaternion as float32): equal to 1e-7 of the size
    for source in (paths["itk.nii.gz"], sitk.ReadImage(str(paths["itk.nii.gz"]))):
        s = sk.from_segmentation(source, 3)
        assert s.faces.tolist() == reference.faces.tolist()
        assert np.abs(s.vertices - reference.vertices).max() < 1e-4


def test_world_frame_is_ras(ball_files):
    """The ball lands at its RAS centre: NIfTI-1's sform frame (+x right, +y anterior), and ITK's
    LPS geometry negated in x and y (DICOM PS3.3 C.7.6.2.1.1 defines LPS patient coordinates)."""
    _, paths, g = ball_files
    for path in paths.values():
        s = sk.from_segmentation(path, 3)
        assert np.abs(np.asarray(s.metadata["mask_centroid_mm"]) - CENTRE_RAS).max() < 0.5
        assert "RAS" in s.metadata["world_frame"]
    for path in (paths[".nrrd"], paths[".mha"], paths[".nii.gz"]):
        assert np.allclose(ImageGrid.of(path).affine, _ras_affine(g), atol=1e-12)


@pytest.fixture
def without_simpleitk(monkeypatch):
    """Imports of SimpleITK fail, as on an install without the itk extra."""
    real_import = builtins.__import__

    def no_sitk(name, *args, **kwargs):
        if name == "SimpleITK":
            raise ImportError("No module named 'SimpleITK'")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_sitk)


def test_missing_extra_is_one_line(ball_files, without_simpleitk):
    _, paths, _ = ball_files
    with pytest.raises(SurfaceError) as err:
        sk.from_segmentation(paths[".nrrd"], 3)
    message = str(err.value)
    assert "\n" not in message and "pip install 'surfacekit[itk]'" in message
    # NIfTI needs no extra
    assert sk.from_segmentation(paths[".nii.gz"], 3).n_vertices > 100


def test_absent_label_lists_labels_present(ball_files):
    _, paths, _ = ball_files
    with pytest.raises(SurfaceError, match=r"label 5 not found .*labels present: \[3\]"):
        sk.from_segmentation(paths[".nrrd"], 5)


def test_unreadable_and_missing_images(tmp_path):
    bad = tmp_path / "bad.nrrd"
    bad.write_text("not an image\n")
    with pytest.raises(SurfaceError, match="cannot read bad.nrrd") as err:
        sk.from_segmentation(bad, 1)
    assert "\n" not in str(err.value)
    with pytest.raises(SurfaceError, match="no such reference image"):
        ImageGrid.of(tmp_path / "missing.nrrd")
    with pytest.raises(SurfaceError, match="cannot read"):
        ImageGrid.of(bad)


def _corr_with_poses():
    """A Correspondence carrying known poses (no matching needed to test the file formats)."""
    rng = np.random.default_rng(4)
    rotation = sk.synthetic.random_rotation(3)
    rigid = sk.correspondence.Transform(rotation, np.array([5.0, -7.0, 2.5]))
    similarity = sk.correspondence.Transform(rotation, np.array([1.0, 2.0, 3.0]), 1.07)
    affine = np.eye(4)
    affine[:3, :3] = rotation @ np.array([[1.1, 0.05, 0.0], [0.0, 0.95, 0.02], [0.03, 0.0, 1.02]])
    affine[:3, 3] = [-4.0, 3.0, 8.0]
    n = 10
    return sk.Correspondence(rng.permutation(n), rng.permutation(n), rigid=rigid,
                             similarity=similarity, affine=affine)


@pytest.mark.parametrize("kind", ["rigid", "similarity", "affine"])
@pytest.mark.parametrize("suffix", [".tfm", ".txt", ".h5", ".mat"])
def test_saved_transform_maps_points_like_the_correspondence(kind, suffix, tmp_path):
    """A point mapped by the file through SimpleITK (in LPS) equals the correspondence's pose:
    fixed = target by default, so the file maps target points to source points."""
    corr = _corr_with_poses()
    points = np.random.default_rng(0).uniform(-80, 80, size=(25, 3))
    path = sk.save_transform(corr, tmp_path / f"t{suffix}", kind)
    tx = sitk.ReadTransform(str(path))
    through_itk = np.array([tx.TransformPoint(tuple(LPS_TO_RAS @ p)) for p in points]) @ LPS_TO_RAS
    pose = pose_matrix(corr, kind)
    back = np.linalg.inv(pose)
    assert np.abs(through_itk - (points @ back[:3, :3].T + back[:3, 3])).max() < 1e-6
    # the other direction, and sk.transform_points / sk.apply_transform read the file the same way
    forward = sk.save_transform(corr, tmp_path / f"f{suffix}", kind, fixed="source")
    assert np.abs(sk.transform_points(forward, points)
                  - sk.transform_points(corr, points, kind=kind)).max() < 1e-6
    assert np.abs(sk.transform_points(path, points) - through_itk).max() < 1e-9


def test_itk_translation_is_read_in_lps():
    """An ITK translation of (+1, +2, +3) mm in LPS moves RAS points by (-1, -2, +3)."""
    points = np.array([[0.0, 0.0, 0.0], [10.0, -20.0, 30.0]])
    moved = sk.transform_points(sitk.TranslationTransform(3, (1.0, 2.0, 3.0)), points)
    assert np.allclose(moved - points, [-1.0, -2.0, 3.0], atol=1e-12)


def test_apply_transform_keeps_outward_faces():
    s = sk.synthetic.icosphere(2, radius=10.0)
    mirror = np.diag([-1.0, 1.0, 1.0, 1.0])
    moved = sk.apply_transform(s, mirror)
    assert moved.signed_volume > 0
    assert np.allclose(moved.vertices[:, 0], -s.vertices[:, 0])
    assert "RAS" in moved.metadata["world_frame"]


def test_bad_kind_format_and_missing_pose_are_one_line(tmp_path):
    corr = _corr_with_poses()
    with pytest.raises(ValueError, match="kind must be one of rigid, similarity, affine, got 'bspline'"):
        sk.save_transform(corr, tmp_path / "t.tfm", "bspline")
    with pytest.raises(SurfaceError, match="must end with one of .tfm"):
        sk.save_transform(corr, tmp_path / "t.nii.gz", "rigid")
    bare = sk.Correspondence(np.arange(3), np.arange(3))
    with pytest.raises(SurfaceError, match="carries no affine transform"):
        sk.save_transform(bare, tmp_path / "t.tfm", "affine")
    assert not list(tmp_path.iterdir())  # nothing written
    with pytest.raises(SurfaceError, match="no such transform file"):
        sk.apply_transform(sk.synthetic.icosphere(1), tmp_path / "missing.tfm")


def test_prepare_command_without_the_extra(ball_files, tmp_path, without_simpleitk, capsys):
    """`surfacekit prepare x.nrrd` without SimpleITK: exit 2, one line naming the extra."""
    from surfacekit.app import cli

    _, paths, _ = ball_files
    code = cli.main(["prepare", str(paths[".nrrd"]), "--label", "3", "-o", str(tmp_path / "o.ply")])
    err = capsys.readouterr().err
    assert code == 2
    assert len(err.strip().splitlines()) == 1 and "pip install 'surfacekit[itk]'" in err
    assert not list(tmp_path.iterdir())


def test_prepare_command_reads_nrrd(ball_files, tmp_path, capsys):
    from surfacekit.app import cli

    _, paths, _ = ball_files
    code = cli.main(["prepare", str(paths[".nrrd"]), "--label", "3", "--no-smooth", "-q",
                     "-o", str(tmp_path / "o.ply")])
    assert code == 0, capsys.readouterr().err
    direct = sk.from_segmentation(paths[".nii.gz"], 3)
    assert abs(sk.load(tmp_path / "o.ply").volume - direct.volume) < 1e-3 * direct.volume
