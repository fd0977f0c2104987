"""Functional-map estimation from descriptors (Ovsjanikov et al., SIGGRAPH 2012) with extra operators."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..mesh.descriptors import heat_kernel_signature, wave_kernel_signature
from ..mesh.eigen import Eigenbasis
from ..mesh.laplacian import face_to_vertex_matrix, gradient
from ..mesh.surface import Surface


@dataclass
class SpectralShape:
    """A surface scaled to unit area with its eigenbasis: what the functional-map energy needs.

    phi (n, k) eigenvectors M-orthonormal on the unit-area surface, values (k,)
    eigenvalues of the unit-area surface, mass (n,) vertex areas summing to 1,
    area (mm²) the total of the eigenbasis' mass.  The spectral quantities are
    rescaled to unit area here only, with the eigenbasis' own mass matrix (the
    intrinsic one when the robust Laplacian was used); only
    :func:`orientation_operators` integrates with the extrinsic face areas (see there).
    """

    surface: Surface
    phi: np.ndarray
    values: np.ndarray
    mass: np.ndarray
    area: float

    @classmethod
    def from_basis(cls, s: Surface, basis: Eigenbasis) -> SpectralShape:
        area = float(basis.mass.sum())
        return cls(s, np.asarray(basis.vectors) * np.sqrt(area), np.asarray(basis.values) * area,
                   np.asarray(basis.mass) / area, area)

    def unit_columns(self, d: np.ndarray) -> np.ndarray:
        """Columns of `d` (n, c) rescaled to unit M-norm on the unit-area surface (all-zero columns stay 0)."""
        return d / np.maximum(np.sqrt(self.mass @ d**2), 1e-300)[None, :]

    def project(self, f: np.ndarray, k: int) -> np.ndarray:
        """Coefficients Φ_kᵀ M f, (k,) or (k, d)."""
        return self.phi[:, :k].T @ (self.mass[:, None] * f if f.ndim > 1 else self.mass * f)


def spectral_descriptors(shape: SpectralShape, basis: Eigenbasis, n_wks: int = 12,
                         n_hks: int = 6) -> np.ndarray:
    """WKS (Aubry et al. 2011) and scale-normalised HKS (Sun et al. 2009) columns, (n, n_wks + n_hks).

    Each column is rescaled to unit M-norm on the unit-area surface, so all
    descriptors weigh alike in the functional-map energy.
    """
    wks = wave_kernel_signature(shape.surface, basis=basis, n_energies=n_wks)
    hks = heat_kernel_signature(shape.surface, basis=basis, n_times=n_hks, normalize_area=True)
    return shape.unit_columns(np.hstack([wks, hks]))


def curvature_patch_descriptors(shape: SpectralShape) -> np.ndarray:
    """Geodesic polar patch descriptors of the scale-free mean curvature ``H √area``, (n, 12).

    :func:`surfacekit.patch_descriptors` (polar soft bins, angular Fourier moduli)
    with its default radius; each column rescaled to unit M-norm on the unit-area
    surface, NaN (rings without finite values, e.g. at a boundary) set to 0.
    """
    from ..mesh.curvature import mean_curvature
    from ..mesh.patches import patch_descriptors

    s = shape.surface
    d = patch_descriptors(s, mean_curvature(s) * np.sqrt(s.area))
    return shape.unit_columns(np.where(np.isfinite(d), d, 0.0))


def landmark_descriptors(shape: SpectralShape, vertices: np.ndarray, k: int = 60,
                         times=(0.1, 0.4, 1.6)) -> np.ndarray:
    """Heat kernel maps centred at landmark vertices, (n, len(vertices) * len(times)).

    Column ``h_t(x, l) = Σ_i exp(-t λ_i / λ_1) φ_i(x) φ_i(l)`` (the heat kernel of
    Sun, Ovsjanikov & Guibas, SGP 2009, at a fixed landmark l; with landmark
    pairs these act as descriptors in the functional-map energy, as in
    Ovsjanikov et al., SIGGRAPH 2012, Sec. 5).  Times are in units of the first
    non-zero eigenvalue, so they mean the same on both shapes; each column is
    rescaled to unit M-norm on the unit-area surface.
    """
    k = min(k, shape.phi.shape[1])
    phi, lam = shape.phi[:, :k], shape.values[:k]
    lam1 = lam[1] if k > 1 and lam[1] > 0 else 1.0
    cols = [phi @ (np.exp(-t * lam / lam1)[:, None] * phi[np.asarray(vertices)].T) for t in times]
    return shape.unit_columns(np.hstack(cols))


def descriptor_operators(shape: SpectralShape, desc: np.ndarray, k: int) -> np.ndarray:
    """Multiplication operators ``Φᵀ M diag(f) Φ`` of each descriptor f, (d, k, k).

    Nogneng & Ovsjanikov, "Informative descriptor preservation via commutativity
    for shape matching", Computer Graphics Forum (Eurographics) 2017.
    """
    phi = shape.phi[:, :k]
    return np.einsum("na,nd,nb->dab", phi * shape.mass[:, None], desc, phi, optimize=True)


def orientation_operators(shape: SpectralShape, desc: np.ndarray, k: int) -> np.ndarray:
    """Orientation-aware operators ``g ↦ ⟨n × ∇f, ∇g⟩`` of each descriptor f, in the basis, (d, k, k).

    Ren, Poulenard, Wonka & Ovsjanikov, "Continuous and orientation-preserving
    correspondences via functional maps", ACM TOG (SIGGRAPH Asia) 2018.  A map that
    commutes with these operators preserves orientation, so mirror-symmetric
    solutions are penalised.  Computed on the unit-area surface; each operator
    is scaled to unit Frobenius norm.
    """
    s = shape.surface
    scale = 1.0 / np.sqrt(s.area)
    G = gradient(s) / scale  # gradients on the unit-area surface
    m = s.n_faces
    grad_f = (G @ desc).reshape(m, 3, -1)                    # (m, 3, d)
    rot = np.cross(s.face_normals[:, :, None], grad_f, axis=1)  # n × ∇f
    grad_phi = (G @ shape.phi[:, :k]).reshape(m, 3, k)       # (m, 3, k)
    # Integrated with the extrinsic face areas, not with `shape.mass`: with the robust
    # Laplacian the two differ, yet integrating with the eigenbasis' mass changed the map
    # of one of the 40 benchmark pairs (hippocampus/anisotropic/seed16 turns intrinsic);
    # the operators are normalised below, so the area scale itself cancels.
    F2V = face_to_vertex_matrix(s, unit_area=True)
    phi = shape.phi[:, :k]
    ops = np.empty((desc.shape[1], k, k))
    for i in range(desc.shape[1]):  # a handful of descriptors, each vectorised
        h = np.einsum("mc,mck->mk", rot[:, :, i], grad_phi)
        ops[i] = phi.T @ (F2V @ h)
        ops[i] /= max(np.linalg.norm(ops[i]), 1e-300)
    return ops


def _commutator_normal(X: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """Normal matrix KᵀK of ``vec(C X - Y C) = K vec(C)`` (column-major vec), (k², k²)."""
    k = X.shape[0]
    eye = np.eye(k)
    return (np.kron(X @ X.T, eye) - np.kron(X, Y) - np.kron(X.T, Y.T) + np.kron(eye, Y.T @ Y))


def estimate_fmap(src: SpectralShape, tgt: SpectralShape, desc_s: np.ndarray, desc_t: np.ndarray,
                  k: int = 30, *, w_descr: float = 1.0, w_lap: float = 1e-2, w_comm: float = 1.0,
                  w_orient: float = 1.0, n_ops: int = 8) -> np.ndarray:
    """Functional map C (k, k) minimising a quadratic energy, solved in closed form.

    ``w_descr ||C A - B||² + w_lap Σ (λ_t,a - λ_s,b)² C_ab² + w_comm Σ_f ||C D_s^f - D_t^f C||²
    + w_orient Σ_f ||C O_s^f - O_t^f C||²``

    with A, B the projected descriptors (Ovsjanikov et al., SIGGRAPH 2012),
    Laplacian commutativity (ibid.), descriptor-commutativity operators D
    (Nogneng & Ovsjanikov, Eurographics 2017) and orientation operators O (Ren et
    al., SIGGRAPH Asia 2018) of `n_ops` evenly chosen descriptors.  Each term is
    normalised by its size.  desc_s (n_s, d), desc_t (n_t, d) must be the same
    descriptors, column by column.  Setting w_comm = w_orient = 0 gives the plain
    functional map.
    """
    A, B = src.project(desc_s, k), tgt.project(desc_t, k)  # (k, d)
    kk = k * k
    H = np.zeros((kk, kk))
    rhs = np.zeros(kk)
    scale = w_descr / max(np.linalg.norm(B) ** 2, 1e-300)
    H += scale * np.kron(A @ A.T, np.eye(k))
    rhs += scale * (B @ A.T).ravel(order="F")
    if w_lap > 0:
        diff = (tgt.values[:k, None] - src.values[None, :k]) ** 2  # (a, b)
        H[np.diag_indices(kk)] += w_lap * (diff / max(np.linalg.norm(diff), 1e-300)).ravel(order="F")
    pick = np.unique(np.linspace(0, desc_s.shape[1] - 1, min(n_ops, desc_s.shape[1])).astype(int))
    if w_comm > 0:
        Ds = descriptor_operators(src, desc_s[:, pick], k)
        Dt = descriptor_operators(tgt, desc_t[:, pick], k)
        for X, Y in zip(Ds, Dt):
            H += (w_comm / len(pick)) * _commutator_normal(X, Y) / max(np.linalg.norm(X) ** 2, 1e-300)
    if w_orient > 0:
        Os = orientation_operators(src, desc_s[:, pick], k)
        Ot = orientation_operators(tgt, desc_t[:, pick], k)
        for X, Y in zip(Os, Ot):
            H += (w_orient / len(pick)) * _commutator_normal(X, Y)
    H[np.diag_indices(kk)] += 1e-10 * np.trace(H) / kk
    c = np.linalg.solve(H, rhs)
    return c.reshape(k, k, order="F")
