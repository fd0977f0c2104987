"""Change maps between a baseline and a follow-up (surfacekit.analysis.change).

Synthetic, invented shapes (surfacekit.mesh.synthetic); the ground-truth correspondence
is the nearest sphere parameter (both meshes triangulate the same parametric shape),
with the rigid pose that ``sk.match`` would fit for it
(surfacekit.correspondence.pose.rigid_pose).
"""
import csv

import numpy as np
import pytest
from scipy.spatial import cKDTree

import surfacekit as sk
from surfacekit.correspondence.pose import rigid_pose

BUMP_CENTRE = np.array([-0.3, -0.7, 0.5]) / np.linalg.norm([-0.3, -0.7, 0.5])


def _truth(source, target, sp_source, sp_target):
    s2t = cKDTree(sp_target).query(sp_source)[1]
    t2s = cKDTree(sp_source).query(sp_target)[1]
    pose, _ = rigid_pose(source, target, s2t, np.ones(source.n_vertices))
    return sk.Correspondence(s2t, t2s, rigid=pose)


def _bump_weight(sphere_points, width=0.2):
    return np.exp(-np.sum((sphere_points - BUMP_CENTRE) ** 2, axis=1) / (2 * width**2))


def _bulge_pair(n_base=3000, n_follow=4000, height=4.0, rotation=None):
    """Kidney baseline; follow-up remeshed (other seed and size), a Gaussian bump of
    `height` mm along the outward normal, then rotated (random by default) and translated."""
    base, sp_b = sk.synthetic.organ_surface("kidney", n_base, seed=1)
    fol0, sp_f = sk.synthetic.organ_surface("kidney", n_follow, seed=7)
    normals = fol0.vertex_normals * np.sign(fol0.signed_volume)
    v = fol0.vertices + height * _bump_weight(sp_f)[:, None] * normals
    R = sk.synthetic.random_rotation(3) if rotation is None else rotation
    fol = fol0.copy_with(vertices=v @ R.T + [10.0, -5.0, 20.0])
    return base, sp_b, fol, sp_f


def _check_bulge(rep, sp_b):
    w = _bump_weight(sp_b)
    centre = np.argmax(w)
    far = w < 1e-3
    # Requirement: 3-5 mm at the centre of a 4 mm bulge, < 0.5 mm mean |.| far away,
    # positive log area ratio at the bulge.
    assert 3.0 <= rep.normal_displacement[centre] <= 5.0
    assert np.abs(rep.normal_displacement[far]).mean() < 0.5
    assert rep.log_area_ratio[centre] > 0


def test_bulge_with_ground_truth_map():
    base, sp_b, fol, sp_f = _bulge_pair()
    rep = sk.measure_change(base, fol, _truth(base, fol, sp_b, sp_f))
    _check_bulge(rep, sp_b)
    # the removed rigid motion is the inverse of the applied one (exact construction)
    R = sk.synthetic.random_rotation(3)
    np.testing.assert_allclose(rep.rigid[:3, :3], R.T, atol=2e-3)
    # Analytic: at the centre of a normal offset h on a convex surface the area element
    # grows by (1 + h k1)(1 + h k2) to first order (parallel surfaces; do Carmo 1976, §3.5);
    # principal curvatures of this kidney region are a few 1/100 mm, so the log ratio is 0.05-0.5.
    assert 0.05 < rep.log_area_ratio[np.argmax(_bump_weight(sp_b))] < 0.5


def test_rigid_copy_shows_no_change():
    base, sp_b = sk.synthetic.organ_surface("kidney", 2000, seed=2)
    fol, sp_f = sk.synthetic.organ_surface("kidney", 2500, seed=3)
    R = sk.synthetic.random_rotation(4)
    fol = fol.copy_with(vertices=fol.vertices @ R.T - 30.0)
    rep = sk.measure_change(base, fol, _truth(base, fol, sp_b, sp_f))
    # Definition: a rigid motion is no change; remeshing only leaves chord-vs-arc error
    # of order h²κ (h edge length ~3 mm, κ ~ 1/30 mm) = a few tenths of a mm at most.
    assert np.abs(rep.normal_displacement).mean() < 0.1
    assert np.abs(rep.log_area_ratio).mean() < 0.03
    assert abs(rep.volume_change_percent) < 1.0


def test_uniform_scaling_of_a_sphere_is_analytic():
    # Analytic: scaling a sphere of radius r by s moves every point (s-1) r along the
    # outward normal and multiplies areas by s² (log ratio 2 ln s); volume by s³.
    base, sp_b = sk.synthetic.organ_surface("sphere", 2000, seed=0)
    fol, sp_f = sk.synthetic.organ_surface("sphere", 2000, seed=0)
    s = 1.1
    fol = fol.copy_with(vertices=fol.vertices * s)
    rep = sk.measure_change(base, fol, _truth(base, fol, sp_b, sp_f))
    # the robust pose cannot absorb a uniform scaling (rigid only), centre stays put; the
    # closest-point pose rounds may spin the sphere (rotation symmetric), so a vertex can
    # land inside a face: chord sagitta ~ edge²/(6R) = (2.6 mm)²/(6·33 mm) ≈ 0.04 mm.
    np.testing.assert_allclose(rep.normal_displacement, 3.0, atol=0.08)
    assert np.mean(rep.normal_displacement) == pytest.approx(3.0, abs=0.02)
    np.testing.assert_allclose(rep.log_area_ratio, 2 * np.log(s), atol=5e-3)
    assert rep.volume_change_percent == pytest.approx(100 * (s**3 - 1), rel=1e-9)
    assert rep.area_change_percent == pytest.approx(100 * (s**2 - 1), rel=1e-9)
    assert rep.summary()["note"].startswith("For research use only")


def test_regional_table_csv_npz_and_fields(tmp_path):
    base, sp_b, fol, sp_f = _bulge_pair(1500, 1800)
    labels = (sp_b @ BUMP_CENTRE > 0.95).astype(int)  # region 1 holds the bulge
    rep = sk.measure_change(base, fol, _truth(base, fol, sp_b, sp_f), labels=labels,
                            names={0: "rest", 1: "bulge"})
    rows = rep.regional_table()
    assert [r["name"] for r in rows] == ["rest", "bulge"]
    assert rows[1]["mean_normal_displacement_outward_mm"] > 1.0 > abs(rows[0]["mean_normal_displacement_outward_mm"])
    assert rows[1]["p95_normal_displacement_outward_mm"] >= rows[1]["median_normal_displacement_outward_mm"]
    assert rows[1]["mapped_area_change_followup_minus_baseline_percent"] > 0
    assert rows[0]["n_vertices"] + rows[1]["n_vertices"] == base.n_vertices
    p1 = rep.to_csv(tmp_path / "change.csv")
    p2 = rep.to_csv(tmp_path / "again.csv")
    assert p1.read_bytes() == p2.read_bytes()  # byte-stable for a cohort diff
    with open(p1, newline="") as fh:
        parsed = list(csv.DictReader(fh))
    assert parsed[1]["name"] == "bulge"
    assert float(parsed[1]["area_mm2"]) == pytest.approx(rows[1]["area_mm2"], rel=1e-5)
    # one definition per metric: the table's whole-surface row is the summary's metrics
    whole = rep.regional_table(labels=np.zeros(base.n_vertices, int))[0]
    summary = rep.summary()
    assert all(summary[k] == whole[k] for k in whole if k not in ("label", "name", "area_mm2"))
    rep.save(tmp_path / "change.npz")
    back = sk.ChangeReport.load(tmp_path / "change.npz")
    np.testing.assert_array_equal(back.normal_displacement, rep.normal_displacement)
    assert back.region_names == {0: "rest", 1: "bulge"}
    assert back.summary() == rep.summary()
    f = rep.fields()
    assert all(np.shape(v) == (base.n_vertices,) for v in f.values())
    np.testing.assert_allclose(np.c_[f["displacement_x"], f["displacement_y"], f["displacement_z"]],
                               rep.displacement)
    # the fields go on the mesh as PLY vertex properties and come back unchanged
    sk.save(base, tmp_path / "change.ply", fields=f)
    _, loaded = sk.io.load_with_fields(tmp_path / "change.ply")
    np.testing.assert_allclose(loaded["normal_displacement"], rep.normal_displacement, rtol=1e-6)
    np.testing.assert_array_equal(loaded["label"], labels)
    # without labels there is one region covering the whole surface
    assert len(rep.regional_table(labels=np.zeros(base.n_vertices, int))) == 1


def test_bad_input():
    base, _ = sk.synthetic.organ_surface("sphere", 300, seed=0)
    ident = sk.Correspondence(np.arange(300), np.arange(300),
                              rigid=sk.analysis.Transform(np.eye(3), np.zeros(3)))
    with pytest.raises(ValueError, match="labels"):
        sk.measure_change(base, base, ident, labels=np.zeros(5, int))
    with pytest.raises(ValueError, match="correspondence"):
        sk.measure_change(base, base, sk.Correspondence(np.arange(10), np.zeros(300, int)))
    with pytest.raises(ValueError, match="Surface"):
        sk.measure_change(base.vertices, base, ident)
    with pytest.raises(ValueError, match="needs the correspondence"):
        sk.measure_change(base, base, None)
    with pytest.raises(ValueError, match="no rigid pose"):
        sk.measure_change(base, base, sk.Correspondence(np.arange(300), np.arange(300)))


@pytest.mark.slow
def test_bulge_end_to_end_with_match():
    """Requirement check with the library's own correspondence (sk.match).

    Follow-up repositioned by a 30 degree rotation and a translation, matched with
    ``same_orientation=True`` (two scans of one patient in one scanner frame).
    """
    from scipy.spatial.transform import Rotation

    R = Rotation.from_rotvec(np.deg2rad(30.0) * np.array([1, 2, 3]) / np.sqrt(14)).as_matrix()
    base, sp_b, fol, _ = _bulge_pair(2000, 2600, rotation=R)
    rep = sk.compare(base, fol, options=sk.MatchOptions(same_orientation=True)).change
    _check_bulge(rep, sp_b)
    # measured here: ~1.2 degrees of tangential pose error left by the map (normal
    # residuals constrain tilt, not sliding); allow 2.3 degrees
    np.testing.assert_allclose(rep.rigid[:3, :3], R.T, atol=0.04)


def test_closest_point_projection_matches_trimesh():
    # Reference: trimesh.proximity.closest_point (exact point-triangle distance, trimesh).
    import trimesh

    from surfacekit.mesh import proximity as geo

    s, _ = sk.synthetic.organ_surface("kidney", 400, seed=2)
    rng = np.random.default_rng(0)
    pts = s.vertices[rng.choice(s.n_vertices, 60)] + rng.normal(scale=4.0, size=(60, 3))
    seeds = np.zeros(60, dtype=np.int64)
    all_faces = (np.repeat(np.arange(60), s.n_faces), np.tile(np.arange(s.n_faces), 60))
    ours = geo.project_pairs(pts, s.vertices, s.faces, all_faces)
    _, ref_dist, _ = trimesh.proximity.closest_point(s.to_trimesh(), pts)
    np.testing.assert_allclose(np.linalg.norm(ours - pts, axis=1), ref_dist, atol=1e-9)
    # the neighbourhood search is the same with candidates from the seed's rings
    near = geo.near_faces(s, seeds, rings=1)
    assert np.all(np.diff(near[0]) >= 0) and len(near[0]) == 60 * len(np.unique(near[1]))


def test_change_starts_from_the_correspondence_pose_and_fits_nothing(monkeypatch):
    """measure_change takes the rigid pose the correspondence carries: no pose is fitted
    (the alignment functions and every SVD, the core of Kabsch's and Umeyama's fits,
    are made to fail), and another pose in the correspondence moves the result by
    exactly that pose."""
    from surfacekit.correspondence import alignment, pose
    from surfacekit.correspondence.alignment import Transform

    base, sp_b, fol, sp_f = _bulge_pair(1200, 1500)
    corr = _truth(base, fol, sp_b, sp_f)
    ref = sk.measure_change(base, fol, corr)

    def no_fit(*args, **kwargs):
        raise AssertionError("measure_change fitted a pose")

    for module, name in ((alignment, "weighted_umeyama"), (alignment, "rigid_transform"),
                         (alignment, "similarity_transform"), (pose, "rigid_pose"),
                         (np.linalg, "svd")):
        monkeypatch.setattr(module, name, no_fit)
    rep = sk.measure_change(base, fol, corr)
    np.testing.assert_array_equal(rep.normal_displacement, ref.normal_displacement)
    np.testing.assert_allclose(rep.rigid, corr.rigid.inverse().matrix, atol=1e-12)
    assert rep.info["alignment_rms_mm"] == corr.rigid.rms
    # the same map with the pose moved 2 mm along x: the follow-up lands 2 mm further,
    # so every displacement changes by the inverse rotation of that shift (translation
    # commutes with the heat smoothing, which keeps constants, and with the projection)
    moved = Transform(corr.rigid.rotation, corr.rigid.translation + [2.0, 0.0, 0.0])
    shifted = sk.Correspondence(corr.source_to_target, corr.target_to_source, rigid=moved)
    rep2 = sk.measure_change(base, fol, shifted)
    np.testing.assert_allclose(rep2.displacement - ref.displacement,
                               np.broadcast_to(-corr.rigid.rotation.T @ [2.0, 0.0, 0.0],
                                               ref.displacement.shape), atol=1e-6)
