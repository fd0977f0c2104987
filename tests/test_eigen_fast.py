"""The block Krylov–Schur eigen-solver (surfacekit/mesh/eigen_block.py) against
independent references: dense LAPACK on a sphere whose eigenvalues come in clusters of
2l + 1, and ARPACK (scipy's eigsh) on a medium-sized ellipsoid; its residual bound,
determinism, and the fallback to ARPACK when it does not converge."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse.linalg as spla

import surfacekit as sk
from surfacekit.mesh import eigen
from surfacekit.mesh.eigen import eigen_shift
from surfacekit.mesh.eigen_block import BlockSolverNoConvergence, block_eigensolve
from surfacekit.mesh.linsolve import cholesky_solver

TOL = 1e-6


def block_solve(L, M, k, **kw):
    sigma = eigen_shift(L, M)
    solve = cholesky_solver((L - sigma * M).tocsc())
    return block_eigensolve(L, M.diagonal(), k, sigma, solve, **kw)


def relative_residuals(L, M, w, V):
    """``‖Lφ − λMφ‖ / (λ_max ‖Mφ‖)`` of each pair."""
    MV = M @ V
    R = L @ V - MV * w[None, :]
    return np.linalg.norm(R, axis=0) / (np.max(w) * np.linalg.norm(MV, axis=0))


@pytest.fixture(scope="module")
def sphere():
    s = sk.synthetic.icosphere(3)  # 642 vertices, unit radius
    L, M = sk.laplacian(s)
    return s, L, M


@pytest.fixture(scope="module")
def ellipsoid():
    s = sk.synthetic.ellipsoid((30.0, 20.0, 15.0), n=6000, seed=1, jitter=0.2)
    L, M = sk.laplacian(s)
    return s, L, M


def test_sphere_clusters_match_dense_lapack(sphere):
    """On the unit sphere the Laplace–Beltrami eigenvalues are l(l + 1) with multiplicity
    2l + 1, the spherical harmonics of degree l (DLMF §14.30(i), NIST Digital Library of
    Mathematical Functions).  The icosphere splits each cluster only slightly (its
    icosahedral symmetry keeps exact multiplicities up to 5), so the span of each
    cluster is well defined; it must agree with dense LAPACK's (scipy.linalg.eigh on the
    generalized problem), and so must every eigenvalue."""
    _, L, M = sphere
    n_deg = 7  # degrees l = 0..6: 49 pairs, ending at the gap 42 -> 56
    k = n_deg ** 2
    lam_ref, phi_ref = scipy.linalg.eigh(L.toarray(), M.toarray(), subset_by_index=[0, k - 1])
    w, V = block_solve(L, M, k)
    order = np.argsort(w)
    w, V = w[order], V[:, order]
    assert abs(w[0]) < 1e-8 * lam_ref[1]
    np.testing.assert_allclose(w[1:], lam_ref[1:], rtol=TOL)
    m = M.diagonal()
    for deg in range(1, n_deg):
        idx = np.arange(deg ** 2, (deg + 1) ** 2)
        # the discrete eigenvalues sit near l(l + 1) (within the discretisation error of
        # 642 vertices), each cluster apart from the next
        assert np.all(np.abs(lam_ref[idx] / (deg * (deg + 1)) - 1) < 0.1)
        if deg < n_deg - 1:
            assert lam_ref[idx].max() < 0.9 * lam_ref[(deg + 1) ** 2]
        overlap = phi_ref[:, idx].T @ (m[:, None] * V[:, idx])
        np.testing.assert_allclose(np.linalg.svd(overlap, compute_uv=False), 1.0, atol=1e-6)
    # exact repeated eigenvalues are all found: the block holds more than 5 vectors
    assert np.sum(np.abs(np.diff(lam_ref[1:])) < 1e-9 * lam_ref[-1]) >= 10
    np.testing.assert_allclose(V.T @ (m[:, None] * V), np.eye(k), atol=1e-10)


def test_medium_mesh_matches_eigsh_and_meets_the_residual_bound(ellipsoid):
    """Against ARPACK's shift-invert Lanczos (scipy.sparse.linalg.eigsh; Lehoucq, Sorensen
    & Yang, ARPACK Users' Guide, SIAM 1998) with SuperLU, an independent code path."""
    _, L, M = ellipsoid
    k = 60
    sigma = eigen_shift(L, M)
    v0 = np.random.default_rng(0).standard_normal(L.shape[0])
    w_ref = np.sort(spla.eigsh(L, k=k, M=M, sigma=sigma, v0=v0, which="LM")[0])
    w, V = block_solve(L, M, k)
    order = np.argsort(w)
    w, V = w[order], V[:, order]
    np.testing.assert_allclose(w[1:], w_ref[1:], rtol=TOL)
    assert np.all(relative_residuals(L, M, w, V) <= TOL)


def test_eigenbasis_block_path_residuals_and_signs(ellipsoid):
    s, L, M = ellipsoid
    s.cache = {key: val for key, val in s.cache.items() if key[0] != "eigenbasis"}
    basis = sk.eigenbasis(s, 40, solver="block")
    assert basis.solver == "block+cholmod" and basis.notes == ()
    assert np.all(relative_residuals(L, M, basis.values, basis.vectors)[1:] <= TOL)
    m = basis.mass
    np.testing.assert_allclose(basis.vectors.T @ (m[:, None] * basis.vectors), np.eye(40), atol=1e-10)
    # the sign rule: the entry of largest magnitude of each vector is positive
    top = np.argmax(np.abs(basis.vectors), axis=0)
    assert np.all(basis.vectors[top, np.arange(40)] > 0)
    ref = sk.eigenbasis(s, 40, solver="cholmod")
    np.testing.assert_allclose(basis.values[1:], ref.values[1:], rtol=TOL)


def test_many_parts_keep_every_zero_eigenvalue():
    """A surface of c separate parts has c zero eigenvalues (one constant per part: the
    multiplicity of 0 is the number of connected components, Fiedler, "Algebraic
    connectivity of graphs", Czech. Math. J. 23, 1973), here more than the block holds."""
    parts = [sk.synthetic.icosphere(1, radius=1.0 + 0.1 * i) for i in range(14)]
    offsets = np.cumsum([0] + [p.n_vertices for p in parts[:-1]])
    s = sk.Surface(np.vstack([p.vertices + [5.0 * i, 0, 0] for i, p in enumerate(parts)]),
                   np.vstack([p.faces + o for p, o in zip(parts, offsets)]))
    L, M = sk.laplacian(s)
    k = 32
    lam_ref = scipy.linalg.eigh(L.toarray(), M.toarray(), eigvals_only=True,
                                subset_by_index=[0, k - 1])
    w, V = block_solve(L, M, k)
    order = np.argsort(w)
    w, V = w[order], V[:, order]
    assert np.sum(np.abs(w) < 1e-9 * w[-1]) == 14
    np.testing.assert_allclose(w[14:], lam_ref[14:], rtol=TOL)
    assert np.all(relative_residuals(L, M, w, V) <= TOL)


def test_deterministic(ellipsoid):
    _, L, M = ellipsoid
    w1, V1 = block_solve(L, M, 30)
    w2, V2 = block_solve(L, M, 30)
    np.testing.assert_array_equal(w1, w2)
    np.testing.assert_array_equal(V1, V2)


def test_restart_cap_raises(ellipsoid):
    _, L, M = ellipsoid
    with pytest.raises(BlockSolverNoConvergence, match="not converged"):
        block_solve(L, M, 60, max_restarts=0)


def test_no_convergence_falls_back_to_arpack(ellipsoid, monkeypatch):
    s, _, _ = ellipsoid
    s.cache = {key: val for key, val in s.cache.items() if key[0] != "eigenbasis"}
    monkeypatch.setattr(eigen, "BLOCK_MAX_RESTARTS", 0)
    with pytest.warns(eigen.EigenSolverWarning, match="block solver did not converge"):
        basis = sk.eigenbasis(s, 60, solver="block")
    assert basis.solver == "arpack-fallback"
    assert any("ARPACK fallback" in note for note in basis.notes)
    ref = sk.eigenbasis(s, 60, solver="cholmod")  # ARPACK on the same factorisation
    np.testing.assert_array_equal(basis.values, ref.values)
    np.testing.assert_array_equal(basis.vectors, ref.vectors)


def test_auto_rule_keeps_small_meshes_on_arpack(ellipsoid, monkeypatch):
    s, _, _ = ellipsoid
    assert s.n_vertices < eigen.BLOCK_MIN_VERTICES
    s.cache = {key: val for key, val in s.cache.items() if key[0] != "eigenbasis"}
    assert sk.eigenbasis(s, 20).solver == "arpack+cholmod"
    assert sk.eigenbasis(s, eigen.BLOCK_MIN_K).solver == "arpack+cholmod"
    # above the size threshold the number of pairs decides
    monkeypatch.setattr(eigen, "BLOCK_MIN_VERTICES", s.n_vertices)
    s.cache = {key: val for key, val in s.cache.items() if key[0] != "eigenbasis"}
    assert sk.eigenbasis(s, eigen.BLOCK_MIN_K - 1).solver == "arpack+cholmod"
    assert sk.eigenbasis(s, eigen.BLOCK_MIN_K).solver == "block+cholmod"
