"""Rigid and similarity alignment (surfacekit.correspondence.alignment).

Outside references: scipy.spatial.transform.Rotation.align_vectors (weighted
Kabsch, SciPy) and scipy.spatial.procrustes (similarity Procrustes, SciPy).
"""
import numpy as np
import pytest
from scipy.spatial import procrustes
from scipy.spatial.transform import Rotation

import surfacekit as sk


def _points(n=200, seed=0):
    return np.random.default_rng(seed).normal(scale=20.0, size=(n, 3))


def test_rigid_recovers_known_motion_exactly():
    # Analytic: target = R x + t exactly, so the least-squares fit is (R, t) (Kabsch 1976).
    x = _points()
    R = sk.synthetic.random_rotation(5)
    t = np.array([12.0, -3.0, 40.0])
    T = sk.rigid_transform(x, x @ R.T + t)
    np.testing.assert_allclose(T.rotation, R, atol=1e-10)
    np.testing.assert_allclose(T.translation, t, atol=1e-8)
    assert T.scale == 1.0
    np.testing.assert_allclose(np.asarray(T)[:3, :3], R, atol=1e-10)
    np.testing.assert_allclose(T.inverse().apply(T.apply(x)), x, atol=1e-9)


def test_weighted_rotation_matches_scipy_align_vectors():
    # Reference: Rotation.align_vectors solves the weighted Wahba/Kabsch problem (SciPy).
    rng = np.random.default_rng(1)
    a = rng.normal(size=(60, 3))
    b = a @ sk.synthetic.random_rotation(2).T + 0.2 * rng.normal(size=a.shape)
    w = rng.uniform(0.1, 2.0, size=60)
    # align_vectors works on vectors (no translation): centre both with the weights first
    ac = a - (w / w.sum()) @ a
    bc = b - (w / w.sum()) @ b
    ref, _ = Rotation.align_vectors(bc, ac, weights=w)
    T = sk.rigid_transform(a, b, weights=w, robust=False)
    np.testing.assert_allclose(T.rotation, ref.as_matrix(), atol=1e-9)


def test_similarity_matches_scipy_procrustes():
    # Reference: scipy.spatial.procrustes standardises both sets and fits scale + rotation
    # of the second onto the first; our Umeyama fit (1991) must give the same aligned points.
    rng = np.random.default_rng(3)
    a = rng.normal(size=(80, 3))
    b = 2.5 * a @ sk.synthetic.random_rotation(4).T + 7.0 + 0.1 * rng.normal(size=a.shape)
    m1, m2, disparity = procrustes(a, b)
    T = sk.similarity_transform(m2 * 1.0, m1, robust=False)
    # scipy's m2 is already optimally aligned, so the extra fit must be the identity
    np.testing.assert_allclose(T.rotation, np.eye(3), atol=1e-8)
    assert T.scale == pytest.approx(1.0, abs=1e-8)
    # and fitting b directly onto the standardised a reproduces scipy's disparity
    T2 = sk.similarity_transform(b, m1, robust=False)
    assert np.sum((T2.apply(b) - m1) ** 2) == pytest.approx(disparity, rel=1e-8)


def test_robust_fit_ignores_outlying_pairs():
    # 30% grossly wrong pairs: plain least squares is biased, the Tukey-reweighted fit is not
    # (breakdown of M-estimators with a MAD scale; Huber, Robust Statistics, 1981).
    x = _points(300, seed=7)
    R = sk.synthetic.random_rotation(8)
    y = x @ R.T + 5.0
    rng = np.random.default_rng(9)
    bad = rng.choice(300, 90, replace=False)
    y_bad = y.copy()
    y_bad[bad] += rng.normal(scale=30.0, size=(90, 3))
    plain = sk.rigid_transform(x, y_bad, robust=False)
    robust = sk.rigid_transform(x, y_bad)
    assert np.abs(plain.rotation - R).max() > 1e-2
    np.testing.assert_allclose(robust.rotation, R, atol=1e-8)
    assert robust.weights[bad].max() < 1e-6


def test_surfaces_with_correspondence_and_confidence():
    s, _ = sk.synthetic.organ_surface("kidney", 600, seed=0)
    R = sk.synthetic.random_rotation(11)
    moved = s.copy_with(vertices=s.vertices @ R.T + [1.0, 2.0, 3.0])
    ident = np.arange(s.n_vertices)
    corr = sk.Correspondence(ident, ident, source_confidence=np.linspace(0, 1, s.n_vertices))
    T = sk.rigid_transform(s, moved, corr)
    np.testing.assert_allclose(T.rotation, R, atol=1e-9)


def test_surfaces_without_correspondence_are_refused():
    """No hidden matching: surfaces need the correspondence that pairs them."""
    s, _ = sk.synthetic.organ_surface("kidney", 300, seed=0)
    with pytest.raises(ValueError, match="correspondence"):
        sk.rigid_transform(s, s)
    with pytest.raises(ValueError, match="correspondence"):
        sk.similarity_transform(s, s)


def test_weighted_umeyama_is_the_solver_kabsch():
    """One least-squares fit: the public wrapper returns the solver's Kabsch bit for bit."""
    from surfacekit.correspondence.alignment import kabsch

    x = _points(40, seed=2)
    y = 1.3 * x @ sk.synthetic.random_rotation(3).T + 2.0
    w = np.linspace(0.5, 1.5, 40)
    for scaling in (False, True):
        ours = sk.analysis.weighted_umeyama(x, y, w, scaling=scaling)
        ref = kabsch(x, y, w, scaling=scaling)
        assert all(np.array_equal(a, b) for a, b in zip(ours, ref))
    with pytest.raises(ValueError, match="all zero"):
        sk.analysis.weighted_umeyama(x, y, np.zeros(40))


def test_bad_input_messages():
    with pytest.raises(ValueError, match="shape"):
        sk.rigid_transform(np.zeros((5, 3)), np.zeros((4, 3)))
    with pytest.raises(ValueError, match="at least 3"):
        sk.rigid_transform(np.zeros((2, 3)), np.zeros((2, 3)))
    with pytest.raises(ValueError, match="non-negative"):
        sk.rigid_transform(_points(10), _points(10), weights=-np.ones(10))
    with pytest.raises(ValueError, match="NaN"):
        sk.rigid_transform(np.full((4, 3), np.nan), np.zeros((4, 3)))
