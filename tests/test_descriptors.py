"""Tests for surfacekit.mesh.descriptors (HKS, SI-HKS, WKS, Laplace spectrum) and curvature."""
import numpy as np
import pytest

import surfacekit as sk
from surfacekit.mesh.synthetic import random_rotation


def _sphere_heat_trace(t, l_max=400):
    """Exact heat kernel diagonal of the unit sphere, (1/4π) Σ (2l+1) e^{-l(l+1)t}.

    Source: addition theorem for spherical harmonics (NIST DLMF §14.30).
    """
    ell = np.arange(l_max)
    return np.sum((2 * ell + 1) * np.exp(-ell * (ell + 1) * t)) / (4 * np.pi)


@pytest.fixture(scope="module")
def organ():
    """Small synthetic organ (1000 vertices: dense eigen-solver, exact to round-off)."""
    return sk.synthetic.organ_surface("kidney", 1000, seed=3)[0]


def _moved(s, seed=7):
    """A rigidly moved copy: random rotation plus a translation (mm)."""
    R = random_rotation(seed)
    return sk.Surface(s.vertices @ R.T + np.array([12.0, -40.0, 7.5]), s.faces)


def test_hks_unit_sphere_matches_exact_series(sphere10k):
    """Source: heat kernel diagonal on the unit sphere (DLMF §14.30; Sun et al. 2009). Target 3%."""
    basis = sk.eigenbasis(sphere10k, 100)
    times = np.array([0.05, 0.1, 0.5])
    hks = sk.heat_kernel_signature(sphere10k, times=times, basis=basis)
    exact = np.array([_sphere_heat_trace(t) for t in times])
    rel = np.abs(hks / exact - 1.0)
    assert rel.max() < 0.03, rel.max(axis=0)
    # default times: Sun et al.'s range 4 ln10/λ_max .. 4 ln10/λ_1 (λ_1 = 2 on the unit sphere)
    t = sk.descriptors.default_heat_times(basis.values)
    assert t[-1] == pytest.approx(4 * np.log(10) / 2.0, rel=0.01)


def test_small_time_hks_tracks_curvature_on_ellipsoid():
    """Source: Minakshisundaram–Pleijel expansion k_t(x,x) ≈ (1 + K t/3)/(4πt) (Sun et al. 2009),
    K of the ellipsoid 1/(a²b²c²(x²/a⁴+y²/b⁴+z²/c⁴)²) (do Carmo 1976).

    Reached at t = 0.1 with 200 eigenpairs on 2500 vertices: max relative error 2.1%,
    mean 0.9% (the next term, (K²+ΔK)t²/15, is up to ~2% where K = 4).  Without the
    curvature term the mean error is 4.1%, so the test also shows K is picked up.
    """
    a, b, c = 1.5, 1.0, 0.75
    e = sk.synthetic.ellipsoid((a, b, c), n=2500)
    x, y, z = e.vertices.T
    K = 1.0 / (a * a * b * b * c * c * (x * x / a**4 + y * y / b**4 + z * z / c**4) ** 2)
    t = 0.1
    h = sk.heat_kernel_signature(e, times=[t], k=200)[:, 0]
    with_k = np.abs(h * 4 * np.pi * t / (1 + K * t / 3) - 1)
    flat = np.abs(h * 4 * np.pi * t - 1)
    assert with_k.max() < 0.03 and with_k.mean() < 0.012
    assert with_k.mean() < 0.5 * flat.mean()
    assert np.corrcoef(h, K)[0, 1] > 0.95


def test_signatures_and_curvature_unchanged_by_rigid_motion(organ):
    """Definition: intrinsic quantities and curvature do not change under rigid motion (do Carmo, Differential Geometry of Curves and Surfaces, 1976, §4-2: isometries preserve intrinsic quantities)."""
    moved = _moved(organ)
    pairs = [
        (sk.heat_kernel_signature(organ, k=60), sk.heat_kernel_signature(moved, k=60)),
        (sk.wave_kernel_signature(organ, k=60), sk.wave_kernel_signature(moved, k=60)),
        (sk.scale_invariant_hks(organ, k=60), sk.scale_invariant_hks(moved, k=60)),
        (sk.mean_curvature(organ), sk.mean_curvature(moved)),
        (sk.gaussian_curvature(organ), sk.gaussian_curvature(moved)),
    ]
    for before, after in pairs:
        assert before.shape == after.shape
        assert np.abs(after - before).max() <= 1e-6 * np.abs(before).max()


def test_scale_invariance(organ):
    """Definition of the normalisations: SI-HKS (Bronstein & Kokkinos 2010), unit-area HKS/WKS
    and Laplace spectrum (Reuter et al. 2006) do not change under uniform scaling."""
    basis = sk.eigenbasis(organ, 60)
    t0 = sk.descriptors.default_heat_times(basis.values, 2)[0] / 2**12  # one fixed grid for both
    si = sk.scale_invariant_hks(organ, basis=basis, t0=t0)
    for factor in (0.5, 3.0):
        big = sk.Surface(organ.vertices * factor, organ.faces)
        si2 = sk.scale_invariant_hks(big, k=60, t0=t0)
        # the grid shifts by 2 log2(factor) octaves; measured 0.10% (x0.5) and 0.03% (x3) change
        assert np.linalg.norm(si2 - si) <= 0.01 * np.linalg.norm(si)
        for fn in (sk.heat_kernel_signature, sk.wave_kernel_signature):
            ref = fn(organ, basis=basis, normalize_area=True)
            assert np.allclose(fn(big, k=60, normalize_area=True), ref, rtol=1e-6, atol=1e-9 * ref.max())
        assert sk.spectrum_distance(organ, big, k=40) < 1e-6
    # the raw HKS does scale, so the normalisation is doing the work (eigenvalues scale as 1/s²)
    raw = sk.heat_kernel_signature(organ, times=[100.0], basis=basis)
    raw2 = sk.heat_kernel_signature(sk.Surface(organ.vertices * 2, organ.faces), times=[400.0], k=60)
    assert np.allclose(raw2, raw / 4, rtol=1e-6)


def _rectangle(a: float, b: float, nx: int, ny: int) -> sk.Surface:
    """Flat a x b rectangle in the plane z = 0, a regular grid of nx x ny vertices."""
    x, y = np.meshgrid(np.linspace(0, a, nx), np.linspace(0, b, ny), indexing="ij")
    ids = np.arange(nx * ny).reshape(nx, ny)
    q = np.c_[ids[:-1, :-1].ravel(), ids[1:, :-1].ravel(), ids[1:, 1:].ravel(), ids[:-1, 1:].ravel()]
    return sk.Surface(np.c_[x.ravel(), y.ravel(), np.zeros(x.size)], np.r_[q[:, [0, 1, 2]], q[:, [0, 2, 3]]])


def _paper_wks(lam: np.ndarray, phi: np.ndarray, shift: float = 0.0, n: int = 100) -> np.ndarray:
    """WKS(x, e) = Σ φ_i(x)² g_i(e) / Σ g_i(e), g_i(e) = exp(-(e - log λ_i)²/2σ²), with the
    energies of Aubry, Schlichting & Cremers ("The wave kernel signature: a quantum mechanical
    approach to shape analysis", ICCV Workshops 2011, the WKS definition and its energy
    sampling; section numbers not checked): δ = (log λ_max - log λ_1)/n,
    σ = 7δ, n log-energies evenly from log λ_1 + 2σ to log λ_max - 2σ (then moved by `shift` σ)."""
    log_lam = np.log(lam)
    sigma = 7 * (log_lam.max() - log_lam.min()) / n
    e = np.linspace(log_lam.min() + 2 * sigma, log_lam.max() - 2 * sigma, n) + shift * sigma
    g = np.exp(-((e[None, :] - log_lam[:, None]) ** 2) / (2 * sigma**2))
    return (phi**2) @ g / g.sum(axis=0)


def test_wks_matches_the_analytic_rectangle():
    """WKS of a flat 1 x 0.6 rectangle against its exact Laplace eigenpairs.

    The cotangent Laplacian of an open mesh carries the natural (Neumann) boundary
    condition of its finite-element weak form, and the Neumann eigenpairs of an a x b
    rectangle are, by separation of variables (Courant & Hilbert, Methods of Mathematical
    Physics I, ch. V; section from memory), λ = π²((m/a)² + (n/b)²) with
    φ = c_m c_n cos(mπx/a) cos(nπy/b) / sqrt(ab), c_0 = 1, c_k = sqrt(2).  The 20 lowest
    non-zero ones go into the paper's formula and energy grid (:func:`_paper_wks`).
    (A sphere cannot test the energies: with complete bands of spherical harmonics the
    WKS is 1/4π at every point and energy, by the addition theorem, DLMF §14.30.9.)

    Measured: 2.1% of the maximum at worst (near the corners), 0.15% on average.  The
    check depends on the energies: the grid moved by σ/4 differs by 15% of the maximum,
    and σ = 6δ or 8δ instead of 7δ by 20% and 13%.
    """
    a, b, k = 1.0, 0.6, 21  # eigenvalue 21 (π²·34) is 6% below eigenvalue 22: a clean cut
    s = _rectangle(a, b, 61, 37)
    basis = sk.eigenbasis(s, k)
    m, n = (g.ravel() for g in np.meshgrid(np.arange(12), np.arange(12), indexing="ij"))
    lam = np.pi**2 * ((m / a) ** 2 + (n / b) ** 2)
    order = np.argsort(lam, kind="stable")[1:k]  # the 20 lowest, without λ = 0
    m, n, lam = m[order], n[order], lam[order]
    assert np.allclose(basis.values[1:], lam, rtol=0.01)  # the mesh is fine enough for them
    x, y = s.vertices[:, :1], s.vertices[:, 1:2]
    c = lambda j: np.where(j == 0, 1.0, np.sqrt(2.0))
    phi = c(m) * c(n) * np.cos(np.pi * m * x / a) * np.cos(np.pi * n * y / b) / np.sqrt(a * b)
    exact = _paper_wks(lam, phi)
    w = sk.wave_kernel_signature(s, basis=basis, normalize=False)
    assert w.shape == (s.n_vertices, 100)
    assert np.abs(w - exact).max() < 0.04 * exact.max()
    # the same comparison against a grid moved by a quarter σ fails: the check sees the energies
    assert np.abs(w - _paper_wks(lam, phi, shift=0.25)).max() > 0.08 * exact.max()
    # without column normalisation each WKS column is a weighted mean of φ_i², and
    # Σ_x A_x φ_i(x)² = 1 (M-orthonormality), so the area integral of every column is 1
    assert np.allclose(basis.mass @ w, 1.0, rtol=1e-9)


def test_laplace_spectrum_weyl_law_and_isometry():
    """Weyl's law N(λ) ≈ Aλ/4π (Reuter et al. 2006 use it): λ_i A/4π ≈ i; sphere values exact."""
    s = sk.synthetic.icosphere(4)
    spectrum = sk.laplace_spectrum(s, 15)
    # unit sphere: eigenvalues l(l+1) with multiplicity 2l+1 (DLMF §14.30), times A/4π ≈ 1
    exact = np.repeat([2.0, 6.0, 12.0], [3, 5, 7])
    assert np.allclose(spectrum, exact, rtol=0.01)
    # an isometric (rigidly moved) copy has distance ~0; a different shape does not
    moved = _moved(s)
    assert sk.spectrum_distance(s, moved, k=15) < 1e-6
    e = sk.synthetic.ellipsoid((1.5, 1.0, 0.7), n=1000)
    assert sk.spectrum_distance(s, e, k=15) > 0.05


def test_sphere_curvature_10k():
    """Source: sphere of radius r has H = 1/r, K = 1/r² (do Carmo 1976); target 2% at 10k vertices.

    Mixed Voronoi areas (Meyer et al. 2003) reach it at every vertex; barycentric areas
    were measured 14.6% off at the icosahedron's valence-5 vertices, hence the default.
    """
    r = 3.0
    s = sk.synthetic.icosphere(5, radius=r)
    assert np.abs(sk.mean_curvature(s) * r - 1).max() < 0.02
    assert np.abs(sk.gaussian_curvature(s) * r * r - 1).max() < 0.02
    # irregular triangulation: 99% of vertices within 2% (measured max 3.9%)
    f = sk.synthetic.fibonacci_sphere(10000)
    assert np.quantile(np.abs(sk.mean_curvature(f) - 1), 0.99) < 0.02
    assert np.quantile(np.abs(sk.gaussian_curvature(f) - 1), 0.99) < 0.02
    # Gauss–Bonnet (do Carmo 1976): Σ K_i A_i = 4π exactly on a closed genus-0 mesh
    assert np.sum(sk.gaussian_curvature(f) * f.voronoi_areas) == pytest.approx(4 * np.pi, rel=1e-9)


def test_curvature_signs_follow_face_winding():
    """Outward winding gives H > 0 on a sphere; reversing the winding flips H, not K (definition)."""
    s = sk.synthetic.icosphere(3)
    inside_out = sk.Surface(s.vertices, s.faces[:, ::-1])
    assert np.all(sk.mean_curvature(s) > 0)
    assert np.allclose(sk.mean_curvature(inside_out), -sk.mean_curvature(s))
    assert np.allclose(sk.gaussian_curvature(inside_out), sk.gaussian_curvature(s))


def test_curvature_boundary_is_nan_and_bad_arguments():
    s = sk.Surface([[0, 0, 0], [1, 0, 0], [0, 1, 0], [1, 1, 0.2]], [[0, 1, 2], [1, 3, 2]])
    assert np.all(np.isnan(sk.mean_curvature(s)))
    with pytest.raises(ValueError):
        sk.gaussian_curvature(s, area="cells")
    organ_like = sk.synthetic.icosphere(2)
    with pytest.raises(ValueError):
        sk.heat_kernel_signature(organ_like, times=[-1.0], k=20)
    with pytest.raises(ValueError):
        sk.laplace_spectrum(organ_like, 0)
