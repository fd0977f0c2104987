"""Laplacian and eigenbasis against analytic spectra and a reference library."""
import numpy as np
import pytest

import surfacekit as sk


def test_sphere_spectrum_matches_spherical_harmonics(sphere10k):
    # Spherical harmonics (NIST DLMF §14.30): λ = l(l+1)/r², multiplicity 2l+1.
    b = sk.eigenbasis(sphere10k, 49)
    l = np.arange(7)
    exact = np.repeat(l * (l + 1), 2 * l + 1)[:49].astype(float)
    assert b.values[0] == pytest.approx(0.0, abs=1e-8)
    rel = np.abs(b.values[1:] - exact[1:]) / exact[1:]
    assert rel.max() < 0.01


def test_weyls_law(sphere10k):
    # Weyl's law (used for Laplace spectrum by Reuter, Wolter & Peinecke 2006): N(λ) ≈ area·λ/(4π).
    # On the unit sphere N(l(l+1)) = (l+1)² so the ratio tends to 1 as l grows.
    b = sk.eigenbasis(sphere10k, 100)
    lam = b.values[-1]
    predicted = sphere10k.area * lam / (4 * np.pi)
    assert 100 / predicted == pytest.approx(1.0, rel=0.15)


def test_eigenvectors_are_mass_orthonormal(ellipsoid_mesh):
    b = sk.eigenbasis(ellipsoid_mesh, 30)
    gram = b.vectors.T @ (b.mass[:, None] * b.vectors)
    assert np.abs(gram - np.eye(30)).max() < 1e-8
    assert np.all(np.diff(b.values) >= -1e-12)


def test_laplacian_equals_robust_laplacian_on_delaunay_mesh(sphere10k):
    # robust-laplacian (Sharp & Crane, SGP 2020) equals the cotangent formula
    # (Pinkall & Polthier 1993) on an intrinsic-Delaunay mesh such as an icosphere.
    import robust_laplacian

    L, M = sk.laplacian(sphere10k, method="cotangent")
    L_ref, M_ref = robust_laplacian.mesh_laplacian(np.asarray(sphere10k.vertices), np.asarray(sphere10k.faces))
    assert abs(L - L_ref).max() <= 1e-10 * abs(L_ref).max()
    assert np.allclose(M.diagonal(), M_ref.diagonal(), rtol=1e-10)


def test_laplacian_is_symmetric_psd_and_kills_constants(ellipsoid_mesh, rng):
    L, M = sk.laplacian(ellipsoid_mesh)
    assert abs(L - L.T).max() < 1e-12
    assert np.abs(L @ np.ones(L.shape[0])).max() < 1e-10
    x = rng.standard_normal((L.shape[0], 5))
    assert np.all(np.einsum("ij,ij->j", x, L @ x) > 0)
    assert M.diagonal().sum() == pytest.approx(ellipsoid_mesh.area, rel=1e-12)


def test_eigenvalues_scale_as_inverse_square(ellipsoid_mesh):
    # Definition: scaling a surface by s scales eigenvalues by 1/s².
    s2 = sk.Surface(ellipsoid_mesh.vertices * 2.5, ellipsoid_mesh.faces)
    a = sk.eigenbasis(ellipsoid_mesh, 20).values[1:]
    b = sk.eigenbasis(s2, 20).values[1:]
    assert np.allclose(b * 2.5**2, a, rtol=1e-8)


def test_rigid_motion_changes_nothing_intrinsic(ellipsoid_mesh):
    R = sk.synthetic.random_rotation(7)
    moved = sk.Surface(ellipsoid_mesh.vertices @ R.T + [10.0, -4.0, 3.0], ellipsoid_mesh.faces)
    a = sk.eigenbasis(ellipsoid_mesh, 20)
    b = sk.eigenbasis(moved, 20)
    assert np.allclose(a.values, b.values, rtol=1e-8, atol=1e-12)
    L1, _ = sk.laplacian(ellipsoid_mesh)
    L2, _ = sk.laplacian(moved)
    assert abs(L1 - L2).max() < 1e-9 * abs(L1).max()


def test_solvers_agree_to_1e_6(ellipsoid_mesh):
    # scipy's ARPACK with its default SuperLU factorisation is the reference solver.
    s = sk.Surface(ellipsoid_mesh.vertices, ellipsoid_mesh.faces)
    fast = sk.eigenbasis(s, 40, solver="cholmod").values
    s.cache.clear()
    ref = sk.eigenbasis(s, 40, solver="arpack-lu").values
    assert np.allclose(fast[1:], ref[1:], rtol=1e-6)


def test_sign_rule_is_deterministic_under_vertex_permutation(ellipsoid_mesh, rng):
    perm = rng.permutation(ellipsoid_mesh.n_vertices)
    inv = np.argsort(perm)
    permuted = sk.Surface(ellipsoid_mesh.vertices[perm], inv[ellipsoid_mesh.faces])
    a = sk.eigenbasis(ellipsoid_mesh, 10).vectors
    b = sk.eigenbasis(permuted, 10).vectors[inv]
    # non-degenerate eigenvalues of a 3:2:1 ellipsoid: vectors equal, signs included
    assert np.abs(a - b).max() < 1e-6


def test_robust_laplacian_chosen_for_non_manifold_mesh(sphere10k, caplog):
    f = np.vstack([sphere10k.faces, [[sphere10k.faces[0, 0], sphere10k.faces[0, 1], 5]]])
    s = sk.Surface(sphere10k.vertices, f)
    with caplog.at_level("INFO", logger="surfacekit"):
        L, _ = sk.laplacian(s)
    assert "robust" in caplog.text and "non-manifold" in caplog.text
    assert np.all(np.isfinite(L.data)) and abs(L - L.T).max() < 1e-10


def test_gradient_divergence_reproduce_laplacian(ellipsoid_mesh, rng):
    # div(grad u) = -L u for piecewise-linear u (Pinkall & Polthier 1993; common practice).
    G = sk.gradient(ellipsoid_mesh)
    D = sk.divergence(ellipsoid_mesh)
    L, _ = sk.laplacian(ellipsoid_mesh, method="cotangent")
    u = rng.standard_normal(ellipsoid_mesh.n_vertices)
    assert np.allclose(D @ (G @ u), -(L @ u), atol=1e-9 * np.abs(L @ u).max())
    # gradient of a linear function x restricted to the surface has norm <= 1
    g = (G @ ellipsoid_mesh.vertices[:, 0]).reshape(-1, 3)
    assert np.linalg.norm(g, axis=1).max() <= 1 + 1e-9


@pytest.mark.parametrize("k", [16, 17, 25])
def test_repeated_eigenvalues_are_all_found(k):
    # Reference: dense generalized eigh (LAPACK) on the same matrices. A rotated
    # icosphere has clusters of repeated eigenvalues (spherical harmonics,
    # DLMF §14.30, split by the icosahedral symmetry); none may be dropped.
    import scipy.linalg

    base = sk.synthetic.icosphere(4)
    s = sk.Surface(base.vertices @ sk.synthetic.random_rotation(7).T, base.faces)
    L, M = sk.laplacian(s)
    ref = scipy.linalg.eigh(L.toarray(), M.toarray(), subset_by_index=[0, k - 1])[0]
    got = sk.eigenbasis(s, k, solver="cholmod").values
    assert np.allclose(got, np.maximum(ref, 0), atol=1e-9, rtol=1e-9)
