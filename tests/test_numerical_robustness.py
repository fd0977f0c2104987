"""Operators on awkward geometry stay finite, fall back and say so (reliability)."""
import warnings

import numpy as np
import pytest
import scipy.sparse.linalg as spla

import surfacekit as sk
from surfacekit.mesh.eigen import EigenSolverWarning


def _with_slivers(s: sk.Surface, n_needles: int = 40, seed: int = 0) -> sk.Surface:
    """Split edges by inserting a vertex 1e-7 of the edge length from one end: needles and caps."""
    rng = np.random.default_rng(seed)
    v = s.vertices.copy()
    f = s.faces.copy()
    for t in rng.choice(len(f), n_needles, replace=False):
        a, b, c = f[t]
        p = v[a] + 1e-7 * (v[b] - v[a])  # almost on top of a: a needle and a cap
        v = np.vstack([v, p])
        new = len(v) - 1
        f[t] = [a, new, c]
        f = np.vstack([f, [new, b, c]])
    return sk.Surface(v, f)


def test_needles_and_caps_switch_to_robust_and_stay_finite(caplog):
    # The split faces have angles of ~1e-7 rad: "auto" must switch to the
    # intrinsic-Delaunay Laplacian (Sharp & Crane 2020) and say so.
    s = _with_slivers(sk.synthetic.icosphere(3))
    with caplog.at_level("INFO", logger="surfacekit"):
        L, M = sk.laplacian(s)
    assert "robust" in caplog.text and "needle" in caplog.text
    assert np.all(np.isfinite(L.data)) and np.all(M.diagonal() > 0)
    b = sk.eigenbasis(s, 10)
    assert np.all(np.isfinite(b.values)) and np.all(np.isfinite(b.vectors))


def test_near_duplicate_vertices_keep_operators_finite():
    s = sk.synthetic.icosphere(3)
    v = s.vertices.copy()
    v[1] = v[0] + 1e-12  # two vertices a picometre apart, both used by faces
    t = sk.Surface(v, s.faces)
    L, M = sk.laplacian(t)
    assert np.all(np.isfinite(L.data)) and np.all(np.isfinite(M.diagonal()))
    assert np.all(np.isfinite(sk.eigenbasis(t, 8).values))


@pytest.mark.parametrize("scale", [1e-3, 1e3])  # micrometres in mm, and metres in mm
def test_extreme_scales_give_scaled_spectra(scale):
    # Definition: eigenvalues scale as 1/s² (scaling the metric by s scales the Laplace–Beltrami operator by 1/s²); the solver's shift must follow the units.
    base = sk.synthetic.ellipsoid((3.0, 2.0, 1.0), n=2000)
    ref = sk.eigenbasis(base, 12).values
    scaled = sk.Surface(base.vertices * scale, base.faces)
    vals = sk.eigenbasis(scaled, 12, solver="cholmod").values
    assert np.allclose(vals[1:] * scale**2, ref[1:], rtol=1e-7)


def test_tiny_mesh_clips_k_and_uses_dense_solver():
    s = sk.synthetic.fibonacci_sphere(50)
    b = sk.eigenbasis(s, 100)
    assert b.k == 49 and b.solver == "dense"
    assert np.all(np.isfinite(b.values))


def test_arpack_failure_falls_back_with_a_warning(monkeypatch):
    s = sk.synthetic.ellipsoid((3.0, 2.0, 1.0), n=2500)
    ref = sk.eigenbasis(s, 10).values

    def refuse(*args, **kwargs):
        raise spla.ArpackNoConvergence("no convergence", np.zeros(0), np.zeros((0, 0)))

    monkeypatch.setattr(spla, "eigsh", refuse)
    t = sk.Surface(s.vertices, s.faces)
    with pytest.warns(EigenSolverWarning, match="falling back"):
        b = sk.eigenbasis(t, 10)
    assert "LOBPCG" in b.notes[0]
    assert np.allclose(b.values[1:], ref[1:], rtol=1e-6)


def test_disconnected_mesh_has_one_zero_eigenvalue_per_component():
    a = sk.synthetic.icosphere(2)
    v = np.vstack([a.vertices, a.vertices + 5.0])
    f = np.vstack([a.faces, a.faces + a.n_vertices])
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # accurate result: no warning expected
        b = sk.eigenbasis(sk.Surface(v, f), 4)
    assert np.sum(b.values < 1e-8) == 2


@pytest.mark.slow
def test_half_million_vertices_operators_finite():
    s = sk.synthetic.fibonacci_sphere(500_000)
    L, M = sk.laplacian(s)
    assert L.shape == (500_000, 500_000) and np.all(np.isfinite(L.data))
    assert M.diagonal().sum() == pytest.approx(4 * np.pi, rel=1e-4)
    b = sk.eigenbasis(s, 4)
    assert np.allclose(b.values[1:], 2.0, rtol=1e-3)  # l = 1 of the unit sphere (DLMF §14.30)
