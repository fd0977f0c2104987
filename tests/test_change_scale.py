"""Change analysis at real sizes: measure_change uses what the correspondence and the
surfaces already carry, equals a direct computation of its documented steps, and needs
memory proportional to the vertex count.

The pairs are synthetic (invented organ-like shapes of tests/groundtruth.py) with a
correspondence built from their known truth, so no match runs here.
"""
from __future__ import annotations

import sys
import tracemalloc

import numpy as np
import pytest
from groundtruth import make_pair

import surfacekit as sk
from surfacekit.correspondence.alignment import Transform
from surfacekit.correspondence.closest import closest_near
from surfacekit.mesh.connectivity import Connectivity
from surfacekit.mesh.proximity import closest_on_faces, near_faces, ring_faces


def truth_pair(n: int, seed: int = 41, deformation: str = "growth"):
    """A ground-truth pair and the correspondence its truth gives: each source vertex to the
    corner of largest weight of its true point, the true rigid pose (make_pair's rotation
    and shift)."""
    pair = make_pair("kidney", deformation, n_source=n, n_target=int(1.2 * n), seed=seed)
    (face_t, bary_t), (face_s, bary_s) = pair.source_truth, pair.target_truth
    s2t = pair.target.faces[face_t, np.argmax(bary_t, axis=1)]
    t2s = pair.source.faces[face_s, np.argmax(bary_s, axis=1)]
    rotation = sk.synthetic.random_rotation(seed)
    shift = np.random.default_rng(seed).normal(0, 50.0, 3)
    corr = sk.Correspondence(s2t, t2s, rigid=Transform(rotation, shift, 1.0, None, 0.0, 0))
    return pair.source, pair.target, corr


# ---------------------------------------------------------------- nothing computed twice
FORBIDDEN = ("eigsh", "eigs", "lobpcg", "eigenbasis", "solve_eigenbasis", "match", "rigid_pose",
             "rigid_transform", "similarity_transform", "cotangent_laplacian")


def _count_calls(monkeypatch, calls: dict) -> None:
    """Wrap every module-level reference (in surfacekit and scipy.sparse.linalg) to the
    functions named in FORBIDDEN with a call counter."""
    originals = {}
    for modname, mod in list(sys.modules.items()):
        if mod is None or not modname.startswith(("surfacekit", "scipy.sparse.linalg")):
            continue
        for name in FORBIDDEN:
            fn = getattr(mod, name, None)
            if callable(fn) and not isinstance(fn, type):
                originals.setdefault(id(fn), (name, fn))
                monkeypatch.setattr(mod, name, _counter(calls, *originals[id(fn)]))


def _counter(calls: dict, name: str, fn):
    def wrapped(*args, **kwargs):
        calls[name] = calls.get(name, 0) + 1
        return fn(*args, **kwargs)
    return wrapped


def test_measure_change_reuses_what_match_left(monkeypatch):
    base, follow, corr = truth_pair(900)
    for s in (base, follow):  # what sk.match leaves cached on the surfaces
        sk.laplacian(s)
        s.connectivity  # noqa: B018
    calls: dict = {}
    _count_calls(monkeypatch, calls)
    built = []
    original_init = Connectivity.__init__

    def counting_init(self, *args, **kwargs):
        built.append(1)
        original_init(self, *args, **kwargs)

    monkeypatch.setattr(Connectivity, "__init__", counting_init)
    from surfacekit.analysis import geometry

    factorise = geometry.cholesky_solver
    factorisations = []
    monkeypatch.setattr(geometry, "cholesky_solver",
                        lambda A: factorisations.append(1) or factorise(A))
    rep = sk.measure_change(base, follow, corr)
    assert calls == {}, f"measure_change recomputed what the correspondence or surfaces carry: {calls}"
    assert not built, "measure_change rebuilt the mesh connectivity"
    # one smoothing operator factorised, shared by the displacement and the area ratio
    assert len(factorisations) == 1
    np.testing.assert_allclose(rep.rigid, corr.rigid.inverse().matrix)
    # the counters do see calls: a pose fit is counted
    from surfacekit.correspondence import alignment

    alignment.rigid_transform(base.vertices, base.vertices)
    assert calls.get("rigid_transform") == 1


# ---------------------------------------------------------------- a direct reference
def _ring_faces_direct(faces: np.ndarray, n: int, rings: int) -> list[set]:
    """For each vertex, the faces touching its `rings`-ring (breadth-first over edges)."""
    neighbours, incident = [set() for _ in range(n)], [set() for _ in range(n)]
    for t, (a, b, c) in enumerate(faces):
        neighbours[a] |= {b, c}
        neighbours[b] |= {a, c}
        neighbours[c] |= {a, b}
        for v in (a, b, c):
            incident[v].add(t)
    out = []
    for seed in range(n):
        reach = {seed}
        for _ in range(rings):
            reach |= set().union(*(neighbours[v] for v in reach))
        out.append(set().union(*(incident[v] for v in reach)))
    return out


def _closest_on_triangles_direct(p, tri):
    """Closest point to p on the nearest of the triangles tri (c, 3, 3): per triangle the
    plane projection when it falls inside, else the best of the three clamped edge
    projections (no Voronoi-region logic); the first of equally near triangles."""
    a, b, c = tri[:, 0], tri[:, 1], tri[:, 2]
    e1, e2, d = b - a, c - a, p - a
    G = np.stack([np.stack([np.sum(e1 * e1, 1), np.sum(e1 * e2, 1)], 1),
                  np.stack([np.sum(e1 * e2, 1), np.sum(e2 * e2, 1)], 1)], 1)
    vw = np.linalg.solve(G, np.stack([np.sum(e1 * d, 1), np.sum(e2 * d, 1)], 1)[..., None])[..., 0]
    inside = (vw[:, 0] >= 0) & (vw[:, 1] >= 0) & (vw.sum(1) <= 1)
    options = [a + vw[:, :1] * e1 + vw[:, 1:] * e2]
    for x, y in ((a, b), (b, c), (c, a)):
        t = np.clip(np.sum((p - x) * (y - x), 1) / np.sum((y - x) ** 2, 1), 0.0, 1.0)
        options.append(x + t[:, None] * (y - x))
    options = np.stack(options, 1)  # (c, 4, 3)
    d2 = np.sum((options - p) ** 2, axis=2)
    d2[:, 0] = np.where(inside, d2[:, 0], np.inf)
    best = options[np.arange(len(tri)), np.argmin(d2, axis=1)]
    return best[np.argmin(np.sum((best - p) ** 2, axis=1))]


def _smooth_dense(s, f, sigma):
    L, M = sk.laplacian(s)
    A = M.toarray() + 0.5 * sigma**2 * L.toarray()
    return np.linalg.solve(A, M.diagonal()[:, None] * f.reshape(len(f), -1)).reshape(f.shape)


def test_measure_change_equals_a_direct_computation():
    base, follow, corr = truth_pair(300, seed=43)
    rep = sk.measure_change(base, follow, corr)
    V, F = base.vertices, base.faces
    moved = (follow.vertices - corr.rigid.translation) @ corr.rigid.rotation  # R^T (x - t)
    sigma = 2.0 * base.mean_edge_length
    points = V + _smooth_dense(base, moved[corr.source_to_target] - V, sigma)
    mapped = np.empty_like(V)
    near = _ring_faces_direct(follow.faces, follow.n_vertices, 2)
    for i, (p, seed) in enumerate(zip(points, corr.source_to_target)):
        mapped[i] = _closest_on_triangles_direct(p, moved[follow.faces[sorted(near[seed])]])
    np.testing.assert_allclose(rep.displacement, mapped - V, atol=1e-9)
    # area-weighted vertex normals: the sum of the incident faces' cross products
    cross = np.cross(V[F[:, 1]] - V[F[:, 0]], V[F[:, 2]] - V[F[:, 0]])
    normals = np.zeros_like(V)
    for k in range(3):
        np.add.at(normals, F[:, k], cross)
    normals /= np.linalg.norm(normals, axis=1, keepdims=True)
    assert base.signed_volume > 0  # outward faces: the normals point outward
    np.testing.assert_allclose(rep.normal_displacement, np.sum((mapped - V) * normals, axis=1),
                               atol=1e-9)
    # log area ratio: signed mapped face area over face area, floored at 1/1000, logged,
    # area-averaged to vertices, smoothed
    area = 0.5 * np.linalg.norm(cross, axis=1)
    mc = np.cross(mapped[F[:, 1]] - mapped[F[:, 0]], mapped[F[:, 2]] - mapped[F[:, 0]])
    mapped_area = 0.5 * np.sum(mc * cross, axis=1) / np.linalg.norm(cross, axis=1)
    log_ratio = np.log(np.maximum(mapped_area, 1e-3 * area) / area)
    num, den = np.zeros(len(V)), np.zeros(len(V))
    for k in range(3):
        np.add.at(num, F[:, k], area * log_ratio)
        np.add.at(den, F[:, k], area)
    np.testing.assert_allclose(rep.log_area_ratio, _smooth_dense(base, num / den, sigma), atol=1e-9)
    assert np.abs(rep.normal_displacement).max() > 0.5  # the growth is seen, not all zero


@pytest.mark.parametrize("rings", [0, 1, 2])
def test_pruned_closest_points_are_bit_identical(rings):
    base, follow, corr = truth_pair(1200, seed=47, deformation="noise")
    rng = np.random.default_rng(rings)
    s2t = corr.source_to_target
    moved = corr.rigid.inverse().apply(follow.vertices)
    # near the surface, and far from it (several edge lengths off in random directions)
    for spread in (0.2, 5.0):
        pts = base.vertices + rng.normal(0.0, spread * base.mean_edge_length, base.vertices.shape)
        expected = closest_on_faces(pts, moved, follow.faces, near_faces(follow, s2t, rings))
        got = closest_near(pts, moved, follow.faces, ring_faces(follow, rings), s2t,
                           follow.connectivity.vertex_adjacency(self_loops=True))
        assert np.array_equal(got[0], expected[0]) and np.array_equal(got[1], expected[1])


# ---------------------------------------------------------------- memory grows linearly
def _same_mesh_pair(n: int):
    """The same triangulation before and after an outward bulge (map: identity)."""
    base, sphere = sk.synthetic.organ_surface("kidney", n, seed=5, jitter=0.3)
    bump = 2.0 * np.exp(-np.sum((sphere - [0.0, 0.0, 1.0]) ** 2, axis=1) / 0.3)
    follow = sk.Surface(base.vertices + bump[:, None] * base.vertex_normals, base.faces)
    ident = np.arange(n)
    corr = sk.Correspondence(ident, ident, rigid=Transform(np.eye(3), np.zeros(3)))
    for s in (base, follow):
        sk.laplacian(s)
    return base, follow, corr


def _traced_peak(base, follow, corr) -> int:
    """Peak of the Python-side allocations (numpy arrays) of measure_change; tracemalloc does
    not see the sparse LU factors SuperLU allocates in C (bench_change.py measures the RSS)."""
    tracemalloc.start()
    try:
        sk.measure_change(base, follow, corr)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_measure_change_memory_grows_linearly():
    small, large = 2000, 8000
    peaks = {n: _traced_peak(*_same_mesh_pair(n)) for n in (small, large)}
    # 4x the vertices: linear memory gives 4x (less here, the blocks of queries being
    # fixed-size), an n x n array 16x
    assert peaks[large] / peaks[small] < 6.0, peaks
    # the candidate pairs are handled in blocks: a few kB per vertex (all candidate pairs at
    # once took about 20 kB per vertex)
    assert peaks[large] / large < 6000, f"{peaks[large] / large:.0f} bytes per vertex"
