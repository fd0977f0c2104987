"""Intrinsic descriptors: heat and wave kernel signatures, Laplace spectrum, curvature.

Every spectral descriptor here reuses the cached eigenbasis of the surface
(:func:`surfacekit.eigenbasis`), so computing several of them costs one
eigen-solve.  They depend only on the Laplace–Beltrami operator, hence they do
not change under rigid motion or isometric bending.

Comparing subjects of different size (unit-area convention)
-----------------------------------------------------------
On a surface scaled by a factor ``c`` (area ``c² A``) eigenvalues become
``λ / c²`` and M-orthonormal eigenfunctions ``φ / c``.  Raw signatures therefore
carry the size of the organ.  With ``normalize_area=True`` the HKS and WKS are
evaluated on the surface rescaled to unit area: eigenvalues are multiplied by
the area ``A`` and eigenfunctions by ``√A``.  Times (HKS) are then dimensionless
(in units of the area), and the values are comparable across subjects of
different size: two surfaces that differ only by a uniform scaling get identical
normalised signatures.  :func:`scale_invariant_hks` needs no normalisation (it
removes scale by construction) and :func:`laplace_spectrum` always uses ``λ·A/(4π)``.
Curvatures are extrinsic-scale quantities (1/mm, 1/mm²) and are left in units.
"""
from __future__ import annotations

import numpy as np

from .curvature import gaussian_curvature, mean_curvature
from .eigen import Eigenbasis, eigenbasis
from .surface import Surface

__all__ = [
    "default_heat_times",
    "gaussian_curvature",
    "heat_kernel_signature",
    "laplace_spectrum",
    "mean_curvature",
    "scale_invariant_hks",
    "spectrum_distance",
    "wave_kernel_signature",
]


def _basis(s: Surface, basis: Eigenbasis | None, k: int) -> Eigenbasis:
    if basis is None:
        return eigenbasis(s, k)
    if basis.vectors.shape[0] != s.n_vertices:
        raise ValueError(f"basis has {basis.vectors.shape[0]} vertices, surface has {s.n_vertices}")
    return basis


def _spectrum(b: Eigenbasis, normalize_area: bool) -> tuple[np.ndarray, np.ndarray]:
    """Eigenvalues and eigenvectors, rescaled to the unit-area surface if asked."""
    lam, phi = b.values, b.vectors
    if normalize_area:
        a = float(b.mass.sum())
        lam, phi = lam * a, phi * np.sqrt(a)
    return lam, phi


def _nonzero(values: np.ndarray) -> np.ndarray:
    """Mask of eigenvalues that are not numerically zero (one zero per closed component)."""
    return values > 1e-9 * max(float(values.max()), 1e-300)


def default_heat_times(values: np.ndarray, n_times: int = 16) -> np.ndarray:
    """(n_times,) log-spaced times from ``4 ln10/λ_max`` to ``4 ln10/λ_1``.

    The range proposed by Sun, Ovsjanikov & Guibas (SGP 2009): at ``t_min`` the
    last eigenpair is damped by ``e^{-4 ln 10} = 10^-4``, so truncating the basis
    there is harmless; ``t_max`` is where the first non-zero eigenpair is damped as
    much.  Units: the inverse of the eigenvalue units (mm² for raw eigenvalues).
    """
    values = np.asarray(values, dtype=float)
    nonzero = values[_nonzero(values)]
    if nonzero.size == 0:
        raise ValueError("eigenbasis has no non-zero eigenvalue; use more eigenpairs")
    lo, hi = 4 * np.log(10) / nonzero.max(), 4 * np.log(10) / nonzero.min()
    return np.geomspace(lo, hi, int(n_times))


def _positive_array(x, name: str) -> np.ndarray:
    a = np.atleast_1d(np.asarray(x, dtype=float)).ravel()
    if a.size == 0 or not np.all(np.isfinite(a)) or np.any(a <= 0):
        raise ValueError(f"{name} must be finite positive numbers, got {x!r}")
    return a


def heat_kernel_signature(s: Surface, times=None, basis: Eigenbasis | None = None, *,
                          k: int = 100, n_times: int = 16, normalize_area: bool = False) -> np.ndarray:
    """Heat kernel signature (Sun, Ovsjanikov & Guibas, Computer Graphics Forum / SGP 2009).

    ``HKS(x, t) = Σ_i exp(-λ_i t) φ_i(x)²``, the heat remaining at x after time t
    from a unit heat source at x, truncated to the eigenbasis.

    Parameters
    ----------
    s : Surface
    times : (T,) positive diffusion times (mm²; dimensionless with `normalize_area`);
        default: `n_times` log-spaced times of :func:`default_heat_times`
    basis : an eigenbasis of `s` to reuse (default ``sk.eigenbasis(s, k)``, cached)
    normalize_area : evaluate on the surface scaled to unit area (module docstring)

    Returns
    -------
    (n, T) array in 1/mm² (dimensionless with `normalize_area`).

    Examples
    --------
    >>> import surfacekit as sk
    >>> s = sk.synthetic.icosphere(3)
    >>> sk.heat_kernel_signature(s, times=[0.1, 1.0], k=50).shape
    (642, 2)
    """
    lam, phi = _spectrum(_basis(s, basis, k), normalize_area)
    t = default_heat_times(lam, n_times) if times is None else _positive_array(times, "times")
    return (phi**2) @ np.exp(-np.outer(lam, t))


def scale_invariant_hks(s: Surface, basis: Eigenbasis | None = None, *, k: int = 100,
                        t0: float | None = None, alpha: float = 2.0, n_octaves: float = 32.0,
                        step: float = 1 / 16, n_frequencies: int = 6) -> np.ndarray:
    """Scale-invariant heat kernel signature (Bronstein & Kokkinos, CVPR 2010).

    The HKS is sampled at ``t = t0 · α^τ`` on a grid of τ with spacing `step`;
    a uniform scaling of the surface multiplies HKS by a constant and shifts it in
    τ.  ``log`` turns the factor into an offset, the τ-derivative removes it, and
    the modulus of the discrete Fourier transform over τ removes the shift.
    The first `n_frequencies` non-zero frequencies are kept (the zero frequency,
    the total change of ``log h``, is set by the basis truncation and dropped).
    Defaults ``α = 2``, step ``1/16``, 6 frequencies follow the paper (from memory);
    with a truncated eigenbasis ``log h`` is flat both for ``t ≪ 1/λ_max`` and
    ``t ≫ 1/λ_1``, so a window of `n_octaves` covering both plateaus makes the
    shift invariance exact up to sampling.

    Parameters
    ----------
    t0 : first time of the grid (mm²).  Default: ``4 ln10 / λ_max / α^12`` of this
        surface.  Pass the same `t0` for all subjects to compare scales honestly.
    alpha, n_octaves, step, n_frequencies : grid base, width (in powers of α), spacing, output size.

    Returns
    -------
    (n, n_frequencies) array, dimensionless.
    """
    b = _basis(s, basis, k)
    if alpha <= 1 or step <= 0 or n_octaves <= 0 or n_frequencies < 1:
        raise ValueError("scale_invariant_hks needs alpha > 1, step > 0, n_octaves > 0, n_frequencies >= 1")
    if t0 is None:
        t0 = default_heat_times(b.values, 2)[0] / alpha**12
    tau = np.arange(0.0, n_octaves + step / 2, step)
    if n_frequencies >= tau.size // 2:
        raise ValueError(f"n_frequencies={n_frequencies} too large for {tau.size} time samples")
    h = heat_kernel_signature(s, times=float(t0) * alpha**tau, basis=b)
    log_h = np.log(np.maximum(h, 1e-300))
    derivative = np.diff(log_h, axis=1) / step
    spectrum = np.abs(np.fft.rfft(derivative, axis=1))
    return spectrum[:, 1:n_frequencies + 1] * step


def wave_kernel_signature(s: Surface, energies=None, basis: Eigenbasis | None = None, *,
                          k: int = 100, n_energies: int = 100, sigma_factor: float = 7.0,
                          normalize: bool = True, normalize_area: bool = False) -> np.ndarray:
    """Wave kernel signature (Aubry, Schlichting & Cremers, ICCV Workshops 2011).

    ``WKS(x, e) = Σ_i φ_i(x)² g_i(e) / Σ_i g_i(e)`` with the log-normal band
    ``g_i(e) = exp(-(e - log λ_i)² / 2σ²)``, the zero eigenvalue left out.  Energy
    sampling of the paper: with ``δ = (log λ_max - log λ_1) / n_energies`` and
    ``σ = sigma_factor · δ`` (sigma_factor 7), the log-energies run evenly from
    ``log λ_1 + 2σ`` to ``log λ_max - 2σ``.  Given `energies` (log-energies, in
    ``log(1/mm²)``), σ is `sigma_factor` times their mean spacing (times δ for a
    single energy).

    Parameters
    ----------
    normalize : divide each column by its M-weighted norm ``sqrt(Σ_x A_x WKS(x,e)²)``
        so that every energy weighs the same in a descriptor (common practice).
    normalize_area : evaluate on the unit-area surface (module docstring); a uniform
        scaling then leaves the WKS unchanged.

    Returns
    -------
    (n, E) array; 1/mm² (dimensionless with `normalize_area`; 1/mm with `normalize`).
    """
    b = _basis(s, basis, k)
    lam, phi = _spectrum(b, normalize_area)
    keep = _nonzero(lam)
    if keep.sum() < 2:
        raise ValueError("wave_kernel_signature needs at least two non-zero eigenvalues")
    lam, phi = lam[keep], phi[:, keep]
    log_lam = np.log(lam)
    if energies is None:
        delta = (log_lam.max() - log_lam.min()) / n_energies
        sigma = sigma_factor * delta
        lo, hi = log_lam.min() + 2 * sigma, log_lam.max() - 2 * sigma
        if hi <= lo:  # too few eigenpairs for the paper's margins
            lo, hi = log_lam.min(), log_lam.max()
        e = np.linspace(lo, hi, n_energies)
    else:
        e = np.atleast_1d(np.asarray(energies, dtype=float)).ravel()
        if e.size == 0 or not np.all(np.isfinite(e)):
            raise ValueError("energies must be finite log-energies")
        spacing = (np.abs(np.diff(e)).mean() if e.size > 1
                   else (log_lam.max() - log_lam.min()) / n_energies)  # the paper's δ
        sigma = sigma_factor * spacing
    weights = np.exp(-((e[None, :] - log_lam[:, None]) ** 2) / (2 * sigma**2))  # (k, E)
    wks = (phi**2) @ weights / np.maximum(weights.sum(axis=0), 1e-300)
    if normalize:
        mass = b.mass / b.mass.sum() if normalize_area else b.mass
        norms = np.sqrt(mass @ wks**2)
        wks = wks / np.maximum(norms, 1e-300)
    return wks


def laplace_spectrum(s: Surface, k: int = 50, basis: Eigenbasis | None = None) -> np.ndarray:
    """The first k non-zero Laplace–Beltrami eigenvalues, normalised by area: the
    "Shape-DNA" of Reuter, Wolter & Peinecke (Computer-Aided Design 38(4), 2006).

    Values are ``λ_i · A / (4π)``: by Weyl's law ``λ_i ≈ 4π i / A``, so the
    normalised sequence grows like ``i`` whatever the size of the shape, and it is
    invariant to rigid motion, isometric bending and uniform scaling.

    Returns
    -------
    (k,) dimensionless, ascending.
    """
    if int(k) < 1:
        raise ValueError(f"k must be >= 1, got {k}")
    n_zero = max(1, s.n_components)
    b = _basis(s, basis, int(k) + n_zero)
    values = b.values[_nonzero(b.values)]
    if values.size < int(k):
        raise ValueError(f"basis gives {values.size} non-zero eigenvalues, {k} requested")
    return values[: int(k)] * float(b.mass.sum()) / (4 * np.pi)


def spectrum_distance(a, b, k: int = 50, *, weighted: bool = True) -> float:
    """Distance between two shapes on their Laplace spectrum (Reuter et al. 2006).

    Euclidean distance between the normalised eigenvalue sequences of
    :func:`laplace_spectrum`.  With ``weighted`` the i-th difference is divided by ``i``,
    so each eigenvalue contributes a relative difference instead of the high
    (large, noisier) eigenvalues dominating (common practice).

    Parameters
    ----------
    a, b : Surface or (k,) precomputed Laplace spectrum sequences

    Returns
    -------
    float, dimensionless; 0 for isometric or uniformly scaled copies.
    """
    da = laplace_spectrum(a, k) if isinstance(a, Surface) else np.asarray(a, dtype=float).ravel()
    db = laplace_spectrum(b, k) if isinstance(b, Surface) else np.asarray(b, dtype=float).ravel()
    m = min(da.size, db.size, int(k))
    if m < 1:
        raise ValueError("spectrum_distance needs non-empty sequences")
    diff = da[:m] - db[:m]
    if weighted:
        diff = diff / np.arange(1, m + 1)
    return float(np.linalg.norm(diff))
