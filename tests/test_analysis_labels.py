"""Label transfer through a correspondence (surfacekit.analysis.labels).

Ground truth: synthetic shapes (invented) whose regions are defined on the sphere
parameter, so the true label of every vertex of either mesh is known exactly.
"""
import numpy as np
import pytest
from scipy.spatial import cKDTree

import surfacekit as sk


def _octant(sphere_points):
    return ((sphere_points[:, 0] > 0) * 1 + (sphere_points[:, 1] > 0) * 2
            + (sphere_points[:, 2] > 0.3) * 4).astype(np.int64)


def test_transfer_matches_ground_truth_regions_and_confidence_marks_borders():
    tpl, sp_t = sk.synthetic.organ_surface("kidney", 2500, seed=0)
    sub, sp_s = sk.synthetic.organ_surface("kidney", 3000, seed=5)
    corr = sk.Correspondence(cKDTree(sp_s).query(sp_t)[1], cKDTree(sp_t).query(sp_s)[1])
    out, conf = sk.transfer_labels(tpl, _octant(sp_t), sub, corr)
    truth = _octant(sp_s)
    assert out.shape == (sub.n_vertices,) and out.dtype == np.int64
    assert np.mean(out == truth) > 0.96
    # wrong labels only where the template's own borders are: within one template edge
    # (~0.08 on the parameter sphere) of a true region border
    edge = np.linalg.norm(sp_t[tpl.edges[:, 0]] - sp_t[tpl.edges[:, 1]], axis=1).mean()
    to_border = np.min(np.abs(np.c_[sp_s[:, 0], sp_s[:, 1], sp_s[:, 2] - 0.3]), axis=1)
    assert to_border[out != truth].max() < edge
    # Definition of the vote share: 1 inside a region, lower where regions meet.
    border = np.abs(sp_s[:, 0]) < 0.03
    inner = (np.abs(sp_s[:, 0]) > 0.3) & (np.abs(sp_s[:, 1]) > 0.3) & (np.abs(sp_s[:, 2] - 0.3) > 0.3)
    assert conf[inner].min() == pytest.approx(1.0)
    assert conf[border].mean() < 0.9
    assert np.all((conf >= 0) & (conf <= 1))


def test_identity_map_is_exact_and_confidence_scales():
    s, sp = sk.synthetic.organ_surface("sphere", 800, seed=1)
    lab = _octant(sp) + 10
    ident = np.arange(s.n_vertices)
    conf_map = np.full(s.n_vertices, 0.5)
    corr = sk.Correspondence(ident, ident, confidence=conf_map)
    out, conf = sk.transfer_labels(s, lab, s, corr)
    # the identity map carries every label as it is (both map directions vote alike)
    np.testing.assert_array_equal(out, lab)
    # confidence: the label's share of the 1-ring (1 inside a region) times the map's 0.5
    # (inside = more than two edges of this 800-vertex unit sphere, ~0.18 each, from a border)
    inner = (np.abs(sp[:, 0]) > 0.4) & (np.abs(sp[:, 1]) > 0.4) & (np.abs(sp[:, 2] - 0.3) > 0.4)
    np.testing.assert_allclose(conf[inner], 0.5)
    assert conf.max() == pytest.approx(0.5) and conf.min() < 0.5


def test_bad_labels():
    s, _ = sk.synthetic.organ_surface("sphere", 200, seed=1)
    ident = sk.Correspondence(np.arange(200), np.arange(200))
    with pytest.raises(ValueError, match="shape"):
        sk.transfer_labels(s, np.zeros(3, int), s, ident)
    with pytest.raises(ValueError, match="integers"):
        sk.transfer_labels(s, np.full(200, 0.5), s, ident)
    # no hidden matching: the correspondence is required and must fit
    with pytest.raises(ValueError, match="needs the correspondence"):
        sk.transfer_labels(s, np.zeros(200, int), s, None)
    with pytest.raises(ValueError, match="vertices"):
        sk.transfer_labels(s, np.zeros(200, int), s, sk.Correspondence(np.arange(10), np.zeros(200, int)))


def test_one_algorithm_for_labels():
    """sk.transfer_labels and Correspondence.transfer(labels=True) carry the same labels."""
    tpl, sp_t = sk.synthetic.organ_surface("kidney", 900, seed=0)
    sub, sp_s = sk.synthetic.organ_surface("kidney", 1100, seed=5)
    corr = sk.Correspondence(cKDTree(sp_s).query(sp_t)[1], cKDTree(sp_t).query(sp_s)[1])
    lab = _octant(sp_t)
    out, _ = sk.transfer_labels(tpl, lab, sub, corr)
    np.testing.assert_array_equal(out, corr.transfer(lab, labels=True))


@pytest.mark.slow
def test_transfer_end_to_end_with_match():
    """Labels carried by the library's own correspondence (sk.match, default options)
    between two differently meshed, rotated copies of an asymmetric synthetic liver."""
    tpl, sp_t = sk.synthetic.organ_surface("liver", 1500, seed=0)
    sub, sp_s = sk.synthetic.organ_surface("liver", 1800, seed=3)
    sub = sub.copy_with(vertices=sub.vertices @ sk.synthetic.random_rotation(6).T + 15.0)
    out, conf = sk.transfer_labels(tpl, _octant(sp_t), sub, sk.match(tpl, sub))
    truth = _octant(sp_s)
    assert np.mean(out == truth) > 0.9
    # wrong labels sit where the confidence is lower
    assert conf[out != truth].mean() < conf[out == truth].mean()
