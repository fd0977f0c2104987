"""Tests of the Correspondence result (transfer, save/load, landmarks) and the map-quality measures."""
import csv

import numpy as np
import pytest

import surfacekit as sk
from surfacekit.correspondence import save_landmarks
from surfacekit.correspondence.evaluation import distortion, error_curve


@pytest.fixture(scope="module")
def sphere():
    return sk.synthetic.icosphere(3, radius=2.0)  # 642 vertices


def shuffled(s, seed=0):
    perm = np.random.default_rng(seed).permutation(s.n_vertices)
    inv = np.empty_like(perm)
    inv[perm] = np.arange(len(perm))
    return sk.Surface(s.vertices[perm], inv[s.faces]), perm, inv


def test_transfer_scalar_vector_and_labels(sphere):
    t, perm, inv = shuffled(sphere)
    corr = sk.Correspondence(source_to_target=inv, target_to_source=perm)
    f = sphere.vertices[:, 2].copy()
    assert np.array_equal(corr.transfer(f), f[perm])
    assert np.array_equal(corr.transfer(sphere.vertices), t.vertices)
    labels = (sphere.vertices[:, 0] > 0).astype(np.int32) + 3
    out = corr.transfer(labels)
    assert out.dtype == np.int32 and np.array_equal(out, labels[perm])
    assert np.array_equal(corr.transfer_back(out), labels)
    with pytest.raises(ValueError, match="values_on_source"):
        corr.transfer(np.zeros(5))


def test_label_vote_uses_both_directions():
    """Target vertex 0 is pulled to source 0 (label 7, weight 1.5), but sources 1 and 2
    (label 9) push onto it: 2 votes against 1.5, so 9 wins.  Target 1 is pulled to
    source 1 (label 9, 1.5) against one push of label 7 (1): 9 (majority vote,
    common practice)."""
    corr = sk.Correspondence(source_to_target=np.array([1, 0, 0]), target_to_source=np.array([0, 1]))
    assert corr.transfer(np.array([7, 9, 9])).tolist() == [9, 9]
    corr2 = sk.Correspondence(source_to_target=np.array([1, 0, 1]), target_to_source=np.array([0, 1]))
    assert corr2.transfer(np.array([7, 9, 9])).tolist() == [7, 9]
    assert corr.transfer(np.array([7.0, 9.0, 9.0])).tolist() == [7.0, 9.0]  # floats are pulled back


def test_save_load_roundtrip_without_pickle(tmp_path):
    rng = np.random.default_rng(0)
    corr = sk.Correspondence(rng.integers(0, 50, 40), rng.integers(0, 40, 50),
                             functional_map=rng.normal(size=(6, 6)), confidence=rng.random(50),
                             source_confidence=rng.random(40), info={"route": "extrinsic", "x": [1, 2]})
    path = corr.save(tmp_path / "c.npz")
    with np.load(path, allow_pickle=False) as data:  # must be readable without pickle
        assert "target_to_source" in data.files
    back = sk.Correspondence.load(path)
    for name in ("source_to_target", "target_to_source", "functional_map", "confidence", "source_confidence"):
        assert np.array_equal(getattr(back, name), getattr(corr, name))
    assert back.info == corr.info
    np.savez(tmp_path / "other.npz", a=np.arange(3))
    with pytest.raises(ValueError, match="not a surfacekit correspondence"):
        sk.Correspondence.load(tmp_path / "other.npz")


def test_invalid_maps_rejected():
    with pytest.raises(ValueError, match="past the last target"):
        sk.Correspondence(np.array([0, 5]), np.array([0, 1]))
    with pytest.raises(ValueError, match="integer"):
        sk.Correspondence(np.array([0.5, 1.0]), np.array([0, 1]))


def test_landmarks_are_spread_and_written(sphere, tmp_path):
    t, perm, inv = shuffled(sphere, seed=2)
    corr = sk.Correspondence(inv, perm)
    lm = corr.landmarks(sphere, t, n=12, seed=1)
    assert np.allclose(lm["source_xyz"], lm["target_xyz"])  # identity geometry
    d = np.linalg.norm(lm["source_xyz"][:, None] - lm["source_xyz"][None], axis=2)
    # 12 farthest points on a sphere of radius 2: nearest-neighbour spacing near the
    # icosahedron's edge 2 * 1.0515 (Gonzalez 1985 gives at least half the optimum)
    assert d[~np.eye(12, dtype=bool)].min() > 1.0
    save_landmarks(lm, tmp_path / "lm.csv")
    save_landmarks(lm, tmp_path / "lm.npz")
    with open(tmp_path / "lm.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == 12 and int(rows[3]["target_vertex"]) == lm["target_index"][3]
    assert float(rows[0]["source_x"]) == pytest.approx(lm["source_xyz"][0, 0], abs=1e-6)
    with np.load(tmp_path / "lm.npz", allow_pickle=False) as data:
        assert np.array_equal(data["source_index"], lm["source_index"])


def test_geodesic_error_matches_great_circles():
    """Heat-method geodesic error on a sphere vs the great-circle distance r·arccos(p·q/r²)
    (great-circle distance); heat method within a few percent at this resolution (Crane et al. 2013)."""
    s = sk.synthetic.icosphere(4, radius=3.0)
    rng = np.random.default_rng(1)
    pred = rng.integers(0, s.n_vertices, 30)
    truth = rng.integers(0, s.n_vertices, 30)
    err = sk.geodesic_error(s, pred, truth, normalize=False)
    p, q = s.vertices[pred], s.vertices[truth]
    exact = 3.0 * np.arccos(np.clip(np.einsum("ij,ij->i", p, q) / 9.0, -1, 1))
    far = exact > 0.5
    assert np.allclose(err[far], exact[far], rtol=0.05)
    norm = sk.geodesic_error(s, pred, truth)
    assert np.allclose(norm, err / np.sqrt(s.area))


def test_error_curve_and_identity_quality(sphere):
    _th, frac = error_curve(np.array([0.0, 0.1, 0.3]), thresholds=[0.0, 0.1, 0.2, 0.5])
    assert frac.tolist() == [1 / 3, 2 / 3, 2 / 3, 1.0]
    ident = np.arange(sphere.n_vertices)
    corr = sk.Correspondence(ident, ident)
    q = sk.map_quality(sphere, sphere, corr, ground_truth=ident, n_samples=40)
    assert q["coverage_source"] == pytest.approx(1.0) and q["round_trip_source_mean"] == 0.0
    assert q["geodesic_error_max"] == 0.0
    assert q["mean_abs_log_area_ratio"] < 1e-9
    assert q["median_conformal_distortion"] == pytest.approx(1.0)


def test_distortion_of_a_stretch():
    """Stretching by 2 along x: area ratio 2 and conformal distortion 2 on faces whose
    plane contains x (singular values of diag(2, 1); Ahlfors 1966).  Normalising by
    sqrt(area) divides both singular values by the same factor, so only the ratio
    and relative areas are checked."""
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [1, 1, 0]], float)
    f = np.array([[0, 1, 2], [1, 3, 2]])
    a = sk.Surface(v, f)
    b = sk.Surface(v * [2.0, 1.0, 1.0], f)
    d = distortion(a, b, np.arange(4))
    assert d["median_conformal_distortion"] == pytest.approx(2.0)
    assert d["mean_abs_log_area_ratio"] == pytest.approx(0.0, abs=1e-12)  # both normalised to unit area
    assert d["collapsed_area_fraction"] == 0.0
