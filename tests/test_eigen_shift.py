"""The shift σ of the shift-invert eigen-solver stays tiny beside the wanted eigenvalues
on a mesh with needle triangles and vertices of near-zero mass, and the eigenpairs
computed with it agree with an independent dense LAPACK solve."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from needle_mesh import needle_sphere

import surfacekit as sk
from surfacekit.mesh.eigen import eigen_shift

# Spherical harmonics of degree l <= 6 number sum(2l + 1) = 49; on the unit sphere their
# eigenvalues are l(l + 1) (DLMF §14.30(i)), so 49 pairs end at a spectral gap (42 -> 56)
# and the span of the computed eigenvectors is well defined.
K = 49


@pytest.fixture(scope="module")
def needle():
    s = needle_sphere()
    L, M = sk.laplacian(s)
    return s, L, M


@pytest.fixture(scope="module")
def reference(needle):
    _, L, M = needle
    return dense_reference(L, M, K)


def dense_reference(L, M, k: int):
    """The k smallest eigenpairs of ``L φ = λ M φ`` from dense LAPACK, through the inverse
    of ``K = L + τM`` with τ = 4π/A: ``S = M^½ K⁻¹ M^½`` has eigenvalues 1/(λ + τ).  This
    form stays accurate when some masses are near zero (the standard form ``M^-½ L M^-½``
    does not: its largest entries reach 1e18 here)."""
    m = M.diagonal()
    tau = 4 * np.pi / m.sum()
    K_inv_sqrt_m = scipy.linalg.cho_solve(scipy.linalg.cho_factor((L + tau * M).toarray()),
                                          np.diag(np.sqrt(m)))
    S = np.sqrt(m)[:, None] * K_inv_sqrt_m
    n = len(m)
    mu, Y = scipy.linalg.eigh(0.5 * (S + S.T), subset_by_index=[n - k, n - 1])
    mu, Y = mu[::-1], Y[:, ::-1]
    phi = (K_inv_sqrt_m @ Y) / mu  # φ = K⁻¹ M^½ y / μ, free of 1/√m
    phi /= np.sqrt(np.einsum("ij,i,ij->j", phi, m, phi))
    return 1.0 / mu - tau, phi


def test_needle_mesh_has_near_zero_masses(needle):
    s, _, M = needle
    m = M.diagonal()
    assert s.n_vertices > 1200  # the sparse shift-invert path, not the dense one
    assert m.min() < 1e-9 * m.max()
    assert np.rad2deg(s.face_angles.min()) < 1e-3


def test_shift_is_tiny_beside_the_wanted_eigenvalues(needle, reference):
    _, L, M = needle
    sigma = eigen_shift(L, M)
    lam, _ = reference
    assert sigma < 0
    assert abs(sigma) < 1e-2 * lam[1]
    # L - σM is positive definite: its Cholesky factorisation exists
    scipy.linalg.cholesky((L - sigma * M).toarray())


def test_needle_mesh_eigenpairs_agree_with_dense_lapack(needle, reference):
    s, _, M = needle
    s.cache = {key: val for key, val in s.cache.items() if key[0] != "eigenbasis"}
    basis = sk.eigenbasis(s, K)
    assert basis.solver == "arpack+cholmod"
    lam, phi = reference
    # λ₀ = 0 (constants); the rest to 1e-6 relative
    assert abs(basis.values[0]) < 1e-8 * lam[1]
    np.testing.assert_allclose(basis.values[1:], lam[1:], rtol=1e-6)
    # same eigenspace: the M-inner products of the two orthonormal bases form an orthogonal matrix
    overlap = phi.T @ (M.diagonal()[:, None] * basis.vectors)
    np.testing.assert_allclose(np.linalg.svd(overlap, compute_uv=False), 1.0, atol=1e-6)


def test_shift_unchanged_on_well_shaped_meshes_and_scale_free():
    s = sk.synthetic.ellipsoid((30.0, 20.0, 15.0), n=1500, seed=1, jitter=0.2)
    L, M = sk.laplacian(s)
    # a well-shaped mesh of this size keeps the earlier rule: 1e-6 of the mean diagonal ratio
    mean_ratio = np.mean(L.diagonal() / M.diagonal())
    assert eigen_shift(L, M) == -1e-6 * mean_ratio
    big = s.copy_with(vertices=1000.0 * s.vertices)  # mm -> µm: eigenvalues scale by 1e-6
    Lb, Mb = sk.laplacian(big)
    assert eigen_shift(Lb, Mb) == pytest.approx(1e-6 * eigen_shift(L, M), rel=1e-9)
