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


def slanted_slope(C: np.ndarray, skip: int = 1) -> float:
    """Slope of the slanted diagonal of a part-by-whole functional map (rows: the part).

    For each column j (the whole's eigenfunction j) the energy-weighted mean row
    ``ī_j = Σ_i i C_ij² / Σ_i C_ij²``; the slope r is fitted by weighted least squares
    (each column weighted by its energy) to ``ī_j = r j + b √j``, b fitted too: Weyl's
    law with its second term for a free (Neumann) boundary counts ``N(λ) ≈ A λ / 4π +
    L √λ / 4π`` eigenvalues below λ on a surface of area A with boundary length L
    (Ivrii, Funct. Anal. Appl. 1980), which puts the part's row there.  The first
    `skip` rows and columns (the near-constant functions) are left out.  About the
    area ratio part / whole for a correct map (Rodolà et al. 2017, §4).
    """
    A = np.asarray(C, dtype=np.float64)[skip:, skip:] ** 2
    rows = np.arange(A.shape[0]) + skip
    cols = np.arange(A.shape[1]) + skip
    energy = A.sum(axis=0)
    mean_row = rows @ A / np.maximum(energy, 1e-300)
    sw = np.sqrt(energy)
    X = np.stack([cols, np.sqrt(cols)], axis=1) * sw[:, None]
    return float(np.linalg.lstsq(X, mean_row * sw, rcond=None)[0][0])


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
