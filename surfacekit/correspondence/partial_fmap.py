"""Functional maps between a part and a whole: the slanted diagonal and the soft indicator.

Rodolà, Cosmo, Bronstein, Torsello & Cremers, "Partial functional correspondence",
Computer Graphics Forum 2017, §4: when a shape N is a part of a shape M, the
functional map C from M to N (rows: N's Laplace–Beltrami eigenfunctions, columns:
M's) is not diagonal but slanted.  By Weyl's law the i-th eigenvalue of a surface
grows like ``4π i / area``, so N's i-th eigenfunction meets M's j-th where
``i / |N| = j / |M|``: the non-zero entries lie along the line ``i = (|N| / |M|) j``,
whose slope is the area ratio, and only about ``(|N| / |M|) k`` of the k rows carry
the map.  Its transpose carries the constant function of N to a band-limited soft
indicator of the region of M that N covers.
"""
from __future__ import annotations

import numpy as np


def overlap_fmap(phi_t: np.ndarray, mass_t: np.ndarray, phi_s: np.ndarray, t2s: np.ndarray,
                 overlap_t: np.ndarray | None = None) -> np.ndarray:
    """Functional map (k_t, k_s) of a point map target -> source, over the target's covered region.

    ``C = Φ_tᵀ diag(m_t · overlap_t) Φ_s[t2s]`` (Ovsjanikov et al., SIGGRAPH 2012,
    with the integral restricted to where the map is defined); phi_t (n_t, k_t) and
    phi_s (n_s, k_s) M-orthonormal eigenvectors, mass_t (n_t,) vertex areas.
    """
    w = np.asarray(mass_t, dtype=np.float64)
    if overlap_t is not None:
        w = w * np.asarray(overlap_t, dtype=np.float64)
    return phi_t.T @ (w[:, None] * phi_s[t2s])


def weyl_boundary_term(boundary_length: float, whole_area: float) -> float:
    """Coefficient b of the boundary term in the row of the slanted diagonal, ``i ≈ r j + b √j``.

    Weyl's law with its second term for a free (Neumann) boundary counts
    ``N(λ) ≈ A λ / 4π + L √λ / 4π`` eigenvalues below λ on a surface of area A with
    boundary length L (Ivrii, Funct. Anal. Appl. 1980); the whole (closed) reaches
    column j at ``λ ≈ 4π j / A_whole``, so the part's row there is
    ``r j + L √j / (2 √(π A_whole))``.
    """
    return float(boundary_length / (2.0 * np.sqrt(np.pi * whole_area)))


def slanted_slope(C: np.ndarray, skip: int = 1, boundary: float | None = None) -> float:
    """Slope of the slanted diagonal of a part-by-whole functional map (rows: the part).

    For each column j (the whole's eigenfunction j) the energy-weighted mean row
    ``ī_j = Σ_i i C_ij² / Σ_i C_ij²``; the slope r is fitted by weighted least squares
    (each column weighted by its energy) to ``ī_j = r j + b √j``: Weyl's law with its
    boundary term (:func:`weyl_boundary_term`) puts the part's row there.  b is fitted
    too unless given (``boundary=0`` fits the plain line ``ī = r j``).  The first
    `skip` rows and columns (the near-constant functions) are left out.  About the
    area ratio part / whole for a correct map (Rodolà et al. 2017, §4).
    """
    A = np.asarray(C, dtype=np.float64)[skip:, skip:] ** 2
    rows = np.arange(A.shape[0]) + skip
    cols = np.arange(A.shape[1]) + skip
    energy = A.sum(axis=0)
    mean_row = rows @ A / np.maximum(energy, 1e-300)
    sw = np.sqrt(energy)
    if boundary is None:
        X = np.stack([cols, np.sqrt(cols)], axis=1) * sw[:, None]
        return float(np.linalg.lstsq(X, mean_row * sw, rcond=None)[0][0])
    y = mean_row - boundary * np.sqrt(cols)
    return float(np.sum(energy * y * cols) / max(np.sum(energy * cols**2), 1e-300))


def slanted_weights(k_rows: int, k_cols: int, slope: float) -> np.ndarray:
    """Penalty (k_rows, k_cols) growing with the distance of entry (i, j) from the line
    ``i = slope · j``, in the spirit of the slanted-diagonal prior of Rodolà et al. 2017
    (eq. 9 there): the row distance ``|i - slope · j|``, so one row off the line costs 1."""
    i, j = np.meshgrid(np.arange(k_rows), np.arange(k_cols), indexing="ij")
    return np.abs(i - slope * j)


def slanted_fmap(C: np.ndarray, slope: float, strength: float = 0.05) -> np.ndarray:
    """A part-by-whole functional map pulled towards its slanted diagonal.

    Minimises ``‖C' - C‖² + strength ‖W ∘ C'‖²`` with W :func:`slanted_weights`; since
    the first term is the least-squares fit to the point map in M-orthonormal bases, the
    minimiser is ``C'_ij = C_ij / (1 + strength W_ij²)``: entries far from the slanted
    line, which a map from a part cannot produce, are damped (a closed-form variant of
    the regularised energy of Rodolà et al. 2017, with the map fixed).
    """
    W = slanted_weights(C.shape[0], C.shape[1], slope)
    return C / (1.0 + strength * W**2)


def soft_indicator(C_part_by_whole: np.ndarray, phi_part: np.ndarray, mass_part: np.ndarray,
                   phi_whole: np.ndarray) -> np.ndarray:
    """Band-limited indicator (n_whole,) of the region of the whole that the part covers.

    The constant 1 on the part, projected on its eigenbasis, carried to the whole by
    ``Cᵀ`` and expanded in the whole's eigenbasis (Rodolà et al. 2017 optimise such an
    indicator jointly with C; here C comes from the point map, so it is read off).
    About 1 over the covered region and 0 elsewhere, smoothed over the shortest
    wavelength of the basis.
    """
    k_p, k_w = C_part_by_whole.shape
    ones = phi_part[:, :k_p].T @ np.asarray(mass_part, dtype=np.float64)
    return phi_whole[:, :k_w] @ (C_part_by_whole.T @ ones)
