"""Procrustes alignment and PCA shape models (surfacekit.analysis.shape_model).

Outside references: scipy.spatial.procrustes (SciPy) for pose removal;
numpy.cov + numpy.linalg.eigh for the PCA variances.  Shapes are synthetic
(invented kidney-like surfaces) with planted modes of variation.
"""
import numpy as np
import pytest
from scipy.spatial import procrustes

import surfacekit as sk


def _template(n=500):
    s, sp = sk.synthetic.organ_surface("kidney", n, seed=0)
    return s, sp


def _planted_modes(x, sp):
    """Two smooth non-rigid deformations, orthonormalised against the rigid motions of x."""
    normals_bump = [np.exp(-np.sum((sp - c) ** 2, axis=1) / 0.1)[:, None] * sp
                    for c in ([1.0, 0, 0], [0, 0, 1.0])]
    xc = x - x.mean(axis=0)
    rigid = [np.tile(e, (len(x), 1)) for e in np.eye(3)] + [np.cross(e, xc) for e in np.eye(3)]
    basis = []
    for v in rigid + normals_bump:
        v = v.ravel().copy()
        for u in basis:
            v -= (u @ v) * u
        basis.append(v / np.linalg.norm(v))
    return basis[6].reshape(-1, 3), basis[7].reshape(-1, 3)


def test_gpa_removes_rigid_pose_exactly():
    s, _ = _template()
    x = s.vertices
    copies = np.stack([x @ sk.synthetic.random_rotation(i).T + 10.0 * i for i in range(6)])
    for scaling in (True, False):
        res = sk.generalized_procrustes(copies, scaling=scaling)
        assert res.converged
        np.testing.assert_allclose(res.aligned, np.broadcast_to(res.aligned[0], res.aligned.shape),
                                   atol=1e-9)
        # scipy.spatial.procrustes: disparity 0 between the input and every aligned copy
        for a in res.aligned:
            assert procrustes(x, a)[2] < 1e-20
        # sizes are kept in mm: the aligned shape is congruent with the input
        assert np.linalg.norm(res.mean - res.mean.mean(0)) == pytest.approx(
            np.linalg.norm(x - x.mean(0)), rel=1e-9)
        for t, c, a in zip(res.transforms, copies, res.aligned):
            np.testing.assert_allclose(t.apply(c), a, atol=1e-9)


def test_gpa_with_scaling_matches_scipy_for_two_shapes():
    # For two shapes, similarity GPA aligns them so that after standardising both
    # (unit Frobenius norm, scipy's convention) the residual equals scipy's disparity.
    rng = np.random.default_rng(0)
    s, _ = _template(300)
    a = s.vertices
    b = 1.7 * (a + rng.normal(scale=1.5, size=a.shape)) @ sk.synthetic.random_rotation(3).T + 5
    res = sk.generalized_procrustes(np.stack([a, b]), scaling=True)
    _, _, disparity = procrustes(a, b)
    p, q = (res.aligned[i] - res.aligned[i].mean(0) for i in (0, 1))
    # scipy fits b to a with a free scale: disparity = 1 - (Σσ)², the same optimum as a
    # symmetric fit; it equals 1 - <p,q>²/(|p|²|q|²) for optimally rotated p, q.
    corr = np.sum(p * q) / (np.linalg.norm(p) * np.linalg.norm(q))
    assert 1 - corr**2 == pytest.approx(disparity, rel=1e-6)


def test_pca_recovers_planted_modes_in_order():
    s, sp = _template(300)
    x = s.vertices
    u1, u2 = _planted_modes(x, sp)
    rng = np.random.default_rng(1)
    n_sub = 40
    b1 = rng.normal(scale=60.0, size=n_sub)
    b2 = rng.normal(scale=25.0, size=n_sub)
    shapes = np.stack([(x + b1[i] * u1 + b2[i] * u2 + rng.normal(scale=0.05, size=x.shape))
                       @ sk.synthetic.random_rotation(50 + i).T + rng.normal(scale=20, size=3)
                       for i in range(n_sub)])
    model = sk.shape_model(shapes)
    # the model frame is the GPA frame (that of the first shape): rotate modes back first
    rot = sk.rigid_transform(model.mean, x, robust=False).rotation
    modes = model.modes @ rot.T
    assert abs(np.sum(modes[0] * u1)) > 0.99
    assert abs(np.sum(modes[1] * u2)) > 0.99
    # variances against numpy's sample covariance of the aligned data (ddof=1)
    data = model.training.reshape(n_sub, -1)
    ref = np.linalg.eigvalsh(np.cov(data, rowvar=False))[::-1]  # (3n, 3n) sample covariance
    np.testing.assert_allclose(model.variances, ref[: model.n_modes], rtol=1e-8, atol=1e-10)
    assert model.variances[0] == pytest.approx(np.var(b1, ddof=1), rel=0.1)
    # quality measures (Davies et al. 2002)
    c = model.compactness()
    assert np.all(np.diff(c) >= 0) and c[-1] == pytest.approx(1.0) and c[1] > 0.98
    g = model.generalisation(max_modes=4)
    # Analytic: with both modes kept, a left-out shape is rebuilt up to its isotropic
    # noise (σ = 0.05 mm per coordinate), whose mean vertex norm is the Maxwell mean
    # 2σ·sqrt(2/π) ≈ 0.080 mm; one mode leaves the second mode's amplitude.
    assert g[1] == pytest.approx(0.05 * 2 * np.sqrt(2 / np.pi), rel=0.05)
    assert g[0] > 3 * g[1]
    sp_ = model.specificity(n_samples=50, max_modes=3, seed=0)
    # model samples carry no noise, training shapes do: specificity is above the noise norm
    assert sp_.shape == (3,) and np.all(sp_ > 0.08)
    # a shape built from the model is reproduced by projection
    b = np.array([30.0, -10.0])
    np.testing.assert_allclose(model.project(model.reconstruct(b), 2), b, atol=1e-9)
    assert model.sample(3, seed=2).shape == (3, x.shape[0], 3)


def test_shape_model_save_load(tmp_path):
    s, _ = _template(100)
    rng = np.random.default_rng(0)
    model = sk.shape_model(s.vertices + rng.normal(size=(5, 100, 3)))
    model.save(tmp_path / "model.npz")
    back = sk.ShapeModel.load(tmp_path / "model.npz")
    np.testing.assert_array_equal(back.modes, model.modes)
    np.testing.assert_array_equal(back.compactness(), model.compactness())


def test_bad_shapes():
    with pytest.raises(ValueError, match="shape"):
        sk.generalized_procrustes(np.zeros((3, 10)))
    with pytest.raises(ValueError, match="at least 2"):
        sk.shape_model(np.zeros((1, 10, 3)))
    with pytest.raises(ValueError, match="NaN"):
        sk.generalized_procrustes(np.full((2, 5, 3), np.nan))


def test_spectral_distances_between_subjects():
    # Reuter, Wolter & Peinecke (2006): Laplace spectrum is invariant to rigid motion and
    # uniform scale, and separates different shapes; remeshing leaves a small residue.
    kid_a, _ = sk.synthetic.organ_surface("kidney", 600, seed=0)
    kid_b, _ = sk.synthetic.organ_surface("kidney", 800, seed=4)
    kid_b = kid_b.copy_with(vertices=1.3 * kid_b.vertices @ sk.synthetic.random_rotation(2).T)
    hip, _ = sk.synthetic.organ_surface("hippocampus", 600, seed=0)
    d = sk.spectral_distances([kid_a, kid_b, hip], k=15)
    np.testing.assert_allclose(d, d.T)
    assert np.all(np.diag(d) == 0)
    assert d[0, 1] < 0.2 * min(d[0, 2], d[1, 2])
    assert d[0, 2] == pytest.approx(sk.spectrum_distance(kid_a, hip, 15), rel=1e-9)
