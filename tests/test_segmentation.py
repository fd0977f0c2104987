"""Label volume -> surface in world mm (surfacekit.preparation.segmentation), and the full path to a
prepared surface.  Volumes are small (<= 110 x 90 x 40) and invented (synthetic)."""
import nibabel as nib
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

import surfacekit as sk
from surfacekit.preparation.mesh_quality import enclosed_centroid

SPACING = np.array([0.7, 0.9, 2.5])  # mm; thick slices as in clinical CT (common practice)
AXES = np.array([30.0, 25.0, 38.0])  # ellipsoid semi-axes, mm


def _oblique_affine() -> np.ndarray:
    """Rotated axes, an x flip (negative determinant) and an offset."""
    lin = Rotation.from_euler("xyz", [20, -15, 30], degrees=True).as_matrix() @ np.diag(
        SPACING * [-1, 1, 1])
    a = np.eye(4)
    a[:3, :3] = lin
    a[:3, 3] = [10.0, -20.0, 5.0]
    return a


def _ellipsoid_volume(second_label: bool = True) -> np.ndarray:
    shape = (110, 90, 40)
    centre = np.array(shape) / 2 - 0.3
    idx = np.indices(shape).reshape(3, -1).T
    inside = (((idx - centre) * SPACING / AXES) ** 2).sum(axis=1) <= 1.0
    vol = np.zeros(shape, np.int16)
    vol.reshape(-1)[inside] = 1
    if second_label:
        # a second organ 3 voxels from the first along x (nearby, not touching)
        x_end = int(np.flatnonzero((vol == 1).any(axis=(1, 2)))[-1])
        vol[x_end + 3:x_end + 12, 35:55, 15:25] = 2
    return vol


@pytest.fixture(scope="module")
def mask_case():
    vol = _ellipsoid_volume()
    affine = _oblique_affine()
    return vol, affine, sk.from_segmentation(vol, 1, affine=affine)


def _mask_reference(vol, affine, label=1):
    """Voxel count x voxel volume and the world centroid of the mask (common practice)."""
    idx = np.argwhere(vol == label)
    volume = len(idx) * abs(np.linalg.det(affine[:3, :3]))
    centroid = affine[:3, :3] @ idx.mean(axis=0) + affine[:3, 3]
    return volume, centroid


def _legendre_ellipsoid_area(a, b, c):
    """Ellipsoid area, Legendre's form (DLMF §19.33.2), a >= b >= c."""
    from scipy.special import ellipeinc, ellipkinc

    phi = np.arccos(c / a)
    k2 = a * a * (b * b - c * c) / (b * b * (a * a - c * c))
    s = np.sin(phi)
    return 2 * np.pi * c * c + 2 * np.pi * a * b / s * (
        ellipeinc(phi, k2) * s * s + ellipkinc(phi, k2) * np.cos(phi) ** 2)


def test_marching_cubes_surface_is_closed_outward_in_world_mm(mask_case):
    vol, affine, s = mask_case
    volume, centroid = _mask_reference(vol, affine)
    assert s.is_closed and s.n_components == 1
    # outward despite det(affine) < 0: positive signed volume and normals away from the centre
    assert np.linalg.det(affine[:3, :3]) < 0 and s.signed_volume > 0
    assert np.mean(np.einsum("ij,ij->i", s.vertex_normals, s.vertices - centroid) > 0) > 0.99
    # marching cubes at level 0.5 on the mask: volume ~ voxel count x voxel volume (common practice)
    assert abs(s.volume / volume - 1) < 0.01
    assert np.linalg.norm(enclosed_centroid(s) - centroid) < 0.5
    # provenance
    md = s.metadata
    assert md["label"] == 1 and md["source"] == "array" and md["from_segmentation"]
    np.testing.assert_allclose(md["spacing"], SPACING)
    assert md["voxel_count"] == int((vol == 1).sum())
    # only label 1 was meshed: nothing reaches into label 2's box
    _lo, hi = md["bounding_box_voxels"]
    assert hi[0] <= int(np.flatnonzero((vol == 2).any(axis=(1, 2)))[0])


def test_mask_to_prepared_surface_meets_the_done_criteria(mask_case):
    """Requirement: one watertight outward component, volume within 3% of voxel count x
    voxel volume (common practice), centroid within 1 mm, vertex count within 15% of target."""
    vol, affine, s = mask_case
    volume, centroid = _mask_reference(vol, affine)
    prepared, report = sk.prepare(s, target_vertices=3000)
    q = report.after
    assert q.n_components == 1 and q.is_watertight and q.is_consistently_oriented
    assert q.is_outward and q.genus == 0 and q.warnings == []
    assert abs(prepared.volume / volume - 1) < 0.03
    assert np.linalg.norm(enclosed_centroid(prepared) - centroid) < 1.0
    assert abs(prepared.n_vertices / 3000 - 1) < 0.15
    # staircase gone: area of the smoothed surface near the analytic ellipsoid area
    # (Legendre's form, DLMF 19.33.2); the raw marching-cubes area is ~14% too large
    exact = _legendre_ellipsoid_area(*sorted(AXES, reverse=True))
    assert s.area / exact - 1 > 0.08
    assert abs(prepared.area / exact - 1) < 0.015
    assert report.parameters["smooth"] is True  # default for surfaces from segmentations
    assert q.mean_min_angle_deg > 35


def test_nifti_file_matches_array_and_records_the_file(tmp_path):
    vol = _ellipsoid_volume()[::2, ::2, :]  # smaller and faster
    affine = _oblique_affine()
    path = tmp_path / "labels.nii.gz"
    nib.save(nib.Nifti1Image(vol, affine), str(path))
    from_file = sk.from_segmentation(path, 2)
    from_array = sk.from_segmentation(vol, 2, affine=affine)
    np.testing.assert_allclose(from_file.vertices, from_array.vertices, atol=1e-4)
    assert from_file.metadata["source"] == str(path) and from_file.metadata["label"] == 2
    np.testing.assert_allclose(from_file.metadata["spacing"], SPACING, rtol=1e-5)
    # spacing override keeps the axis directions, replaces the voxel sizes
    coarse = sk.from_segmentation(path, 2, spacing=(1.0, 1.0, 1.0))
    np.testing.assert_allclose(coarse.metadata["spacing"], [1.0, 1.0, 1.0])
    assert abs(coarse.volume * np.prod(SPACING) / from_file.volume - 1) < 1e-6


def test_axis_flips_keep_normals_outward():
    vol = np.zeros((20, 22, 24), np.uint8)
    vol[4:16, 5:17, 6:19] = 5
    for flip in ([1, 1, 1], [-1, 1, 1], [-1, -1, 1], [-1, -1, -1]):
        s = sk.from_segmentation(vol, 5, affine=np.diag([*flip, 1.0]))
        assert s.signed_volume > 0, flip
        # the mask is a box of 12 x 12 x 13 voxels; level-0.5 faces lie on the voxel walls
        assert np.allclose(np.ptp(s.vertices, axis=0), [12, 12, 13])


def test_absent_label_and_bad_input_raise_clear_errors():
    vol = np.zeros((10, 10, 10), np.uint8)
    vol[2:5, 2:5, 2:5] = 3
    vol[6:8, 6:8, 6:8] = 7
    with pytest.raises(sk.SurfaceError, match=r"label 4 not found.*\[3, 7\]"):
        sk.from_segmentation(vol, 4)
    with pytest.raises(sk.SurfaceError, match="3-D"):
        sk.from_segmentation(np.zeros((4, 4)), 1)
    with pytest.raises(sk.SurfaceError, match="singular"):
        sk.from_segmentation(vol, 3, affine=np.diag([1.0, 0.0, 1.0, 1.0]))
    with pytest.raises(sk.SurfaceError, match="integer"):
        sk.from_segmentation(vol, 2.5)
    with pytest.raises(sk.SurfaceError, match="spacing"):
        sk.from_segmentation(vol, 3, spacing=(1.0, -1.0, 1.0))
    with pytest.raises(sk.SurfaceError, match="no such"):
        sk.from_segmentation("/nonexistent/labels.nii.gz", 1)


def test_label_touching_the_volume_border_is_closed():
    vol = np.zeros((12, 12, 12), np.uint8)
    vol[:6, :, 3:9] = 1  # touches three faces of the array
    s = sk.from_segmentation(vol, 1, spacing=(2.0, 1.0, 1.0))
    assert s.is_closed and s.signed_volume > 0
    assert abs(s.volume / (vol.sum() * 2.0) - 1) < 0.05
