"""Intrinsic spectral descriptors: heat and wave kernel signatures.

Conventions: signatures are computed on the surface as given (mm); pass
``normalize_area=True`` to evaluate them on the surface rescaled to unit area,
which makes values comparable across subjects of different size.
"""
from __future__ import annotations

import numpy as np

from .operators import Eigenbasis, eigenbasis
from .surface import Surface


def _basis(s: Surface, basis: Eigenbasis | None, k: int) -> Eigenbasis:
    return basis if basis is not None else eigenbasis(s, k)


def default_heat_times(values: np.ndarray, n_times: int = 16) -> np.ndarray:
    """Log-spaced times from ``4 ln10 / λ_max`` to ``4 ln10 / λ_1`` (Sun, Ovsjanikov & Guibas 2009)."""
    nonzero = values[values > 1e-12 * max(values.max(), 1e-300)]
    lo, hi = 4 * np.log(10) / nonzero.max(), 4 * np.log(10) / nonzero.min()
    return np.geomspace(lo, hi, n_times)


def heat_kernel_signature(s: Surface, times=None, basis: Eigenbasis | None = None, *,
                          k: int = 100, n_times: int = 16, normalize_area: bool = False) -> np.ndarray:
    """Heat kernel signature (Sun, Ovsjanikov & Guibas, SGP 2009).

    ``HKS(x, t) = Σ_i exp(-λ_i t) φ_i(x)²`` over the eigenbasis.

    Parameters
    ----------
    s : Surface
    times : (T,) diffusion times (mm²); default: `n_times` log-spaced from the spectrum
    basis : an eigenbasis of `s` to reuse (default ``sk.eigenbasis(s, k)``)
    normalize_area : evaluate on the surface scaled to unit area (times then dimensionless)

    Returns
    -------
    (n, T) array, 1/mm² (dimensionless per unit area with `normalize_area`)
    """
    b = _basis(s, basis, k)
    lam, phi = b.values, b.vectors
    if normalize_area:
        a = float(b.mass.sum())
        lam, phi = lam * a, phi * np.sqrt(a)
    t = default_heat_times(lam, n_times) if times is None else np.atleast_1d(np.asarray(times, float))
    return (phi**2) @ np.exp(-np.outer(lam, t))


def wave_kernel_signature(s: Surface, energies=None, basis: Eigenbasis | None = None, *,
                          k: int = 100, n_energies: int = 100, sigma_factor: float = 7.0,
                          normalize: bool = True) -> np.ndarray:
    """Wave kernel signature (Aubry, Schlichting & Cremers, ICCV Workshops 2011).

    ``WKS(x, e) = Σ_i φ_i(x)² exp(-(e - log λ_i)² / 2σ²) / Σ_i exp(-(e - log λ_i)² / 2σ²)``,
    log-energies ``e`` evenly spaced between ``log λ_1`` and ``log λ_max`` with
    ``σ = sigma_factor × spacing`` (the paper's choice, sigma_factor = 7), the zero
    eigenvalue left out.  Invariant to uniform scaling up to the energy shift.

    Returns
    -------
    (n, E) array; with ``normalize`` each column is divided by its M-weighted norm.
    """
    b = _basis(s, basis, k)
    keep = b.values > 1e-12 * max(b.values.max(), 1e-300)
    lam, phi = b.values[keep], b.vectors[:, keep]
    log_lam = np.log(lam)
    if energies is None:
        e = np.linspace(log_lam.min(), log_lam.max(), n_energies)
        sigma = sigma_factor * (e[1] - e[0]) if n_energies > 1 else 1.0
    else:
        e = np.atleast_1d(np.asarray(energies, float))
        sigma = sigma_factor * (np.diff(e).mean() if len(e) > 1 else 1.0)
    weights = np.exp(-((e[None, :] - log_lam[:, None]) ** 2) / (2 * sigma**2))  # (k, E)
    wks = (phi**2) @ weights / np.maximum(weights.sum(axis=0), 1e-300)
    if normalize:
        norms = np.sqrt(b.mass @ wks**2)
        wks = wks / np.maximum(norms, 1e-300)
    return wks
