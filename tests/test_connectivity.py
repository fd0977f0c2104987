"""One connectivity per triangulation, shared and cached; caches keyed by every parameter;
one home for the thresholds; one face-to-vertex operator; one farthest-point loop."""
import numpy as np
import pytest
import trimesh

import surfacekit as sk
from surfacekit.mesh import eigen
from surfacekit.mesh.connectivity import Connectivity
from surfacekit.mesh.laplacian import (
    face_to_vertex_matrix,
    face_to_vertex_mean,
    needs_robust_laplacian,
)
from surfacekit.mesh.limits import NEEDLE_ANGLE_DEGREES
from surfacekit.mesh.sampling import farthest_points, greedy_farthest
from surfacekit.preparation import mesh_quality, repair


def _edge_set(edges):
    return set(map(tuple, np.sort(np.asarray(edges), axis=1)))


# ------------------------------------------------------------ against trimesh
def test_edges_adjacency_and_components_agree_with_trimesh():
    """trimesh (an independent implementation) as reference: unique edges, vertex
    neighbours, boundary edges and connected components of two disjoint patches."""
    a = sk.synthetic.icosphere(2)
    keep = a.vertices[a.faces].mean(axis=1)[:, 2] < 0.6  # an open cap
    f = np.vstack([a.faces[keep], a.faces[keep] + a.n_vertices])
    v = np.vstack([a.vertices, a.vertices + 5.0])
    s = sk.Surface(v, f)
    ref = trimesh.Trimesh(v, f, process=False)
    conn = s.connectivity
    assert _edge_set(conn.edges) == _edge_set(ref.edges_unique)
    assert np.all(np.diff(conn.edges[:, 0] * len(v) + conn.edges[:, 1]) > 0)  # sorted, unique
    adj = conn.vertex_adjacency()
    for i in (0, 7, 40, a.n_vertices + 3):
        assert set(adj[i].indices) == set(ref.vertex_neighbors[i])
    ref_boundary = ref.edges_sorted[trimesh.grouping.group_rows(ref.edges_sorted, require_count=1)]
    assert _edge_set(conn.boundary_edges) == _edge_set(ref_boundary)
    assert conn.n_components == 2 and len(conn.boundary_loops) == 2
    labels = conn.vertex_components
    for comp in trimesh.graph.connected_components(ref.edges_unique, min_len=2):
        assert len(np.unique(labels[comp])) == 1


def test_euler_characteristic_and_genus_of_a_torus():
    """χ = V - E + F = 0 and genus 1 for a torus (Euler's polyhedron formula; do Carmo 1976)."""
    t = trimesh.creation.torus(major_radius=2.0, minor_radius=0.5)
    conn = Connectivity(t.faces, len(t.vertices))
    assert conn.euler_characteristic == 0 and conn.genus == 1 and conn.is_closed


# ------------------------------------------------------- flaws on raw faces
def test_flaws_seen_on_raw_faces():
    # two triangles joined at a single vertex (a bow tie): a pinched vertex with two fans
    bowtie = np.array([[0, 1, 2], [0, 3, 4]])
    conn = Connectivity(bowtie, 5)
    assert conn.vertex_fans.tolist() == [2, 1, 1, 1, 1]
    # a square of two triangles, the second flipped, plus a copy of the first in reverse
    f = np.array([[0, 1, 2], [0, 2, 3], [2, 1, 0]])
    f_flipped = np.array([[0, 1, 2], [0, 3, 2]])
    assert Connectivity(f).duplicate_faces.tolist() == [False, False, True]
    assert Connectivity(f_flipped).n_inconsistent_edges == 1
    assert Connectivity(f[:2]).n_inconsistent_edges == 0
    assert Connectivity(f[:2]).has_edges([[2, 0], [1, 3]]).tolist() == [True, False]


def test_repair_uses_the_shared_adjacency():
    s = sk.synthetic.icosphere(2)
    W = repair.umbrella_matrix(s.faces, s.n_vertices)
    A = s.connectivity.vertex_adjacency()
    assert np.array_equal(W.indptr, A.indptr) and np.allclose(W.sum(axis=1), 1.0)


# ------------------------------------------------------------- shared, cached
def test_moved_vertices_reuse_the_connectivity():
    s = sk.synthetic.icosphere(2)
    moved = s.copy_with(vertices=s.vertices * 2.0)
    assert moved.connectivity is s.connectivity
    assert moved.edges is s.edges
    assert moved.area == pytest.approx(4.0 * s.area)
    same_faces = s.copy_with(vertices=s.vertices + 1.0, faces=np.array(s.faces))
    assert same_faces.connectivity is s.connectivity
    other = s.copy_with(faces=s.faces[:, ::-1])
    assert other.connectivity is not s.connectivity


def test_shared_adjacency_is_read_only():
    s = sk.synthetic.icosphere(1)
    with pytest.raises(ValueError):
        s.connectivity.vertex_adjacency().data[0] = 2.0
    with pytest.raises(ValueError):
        s.edges[0, 0] = 1


def test_eigenbasis_cache_key_includes_the_solver(monkeypatch):
    """A basis cached from one solver is not returned for another; a larger basis of
    the same operator and solver serves a smaller k without a new solve."""
    solves = []
    real = eigen.solve_eigenbasis

    def counting(L, M, k, solver):
        solves.append((k, solver))
        return real(L, M, k, solver)

    monkeypatch.setattr(eigen, "solve_eigenbasis", counting)
    s = sk.synthetic.icosphere(3)
    dense = sk.eigenbasis(s, 12)
    assert dense.solver == "dense"
    lob = sk.eigenbasis(s, 10, solver="lobpcg")
    assert lob.solver == "lobpcg"
    assert solves == [(12, "auto"), (10, "lobpcg")]
    again = sk.eigenbasis(s, 8)  # served by the cached 12-pair basis
    assert again.solver == "dense" and len(solves) == 2
    np.testing.assert_array_equal(again.values, dense.values[:8])
    # the two solvers agree on the spectrum, as they must
    np.testing.assert_allclose(lob.values[1:], dense.values[1:10], rtol=1e-6)


def test_laplacian_cache_key_includes_method_and_mass():
    s = sk.synthetic.ellipsoid((3.0, 2.0, 1.0), n=800)
    L, M_bary = sk.laplacian(s, method="cotangent")
    _, M_vor = sk.laplacian(s, method="cotangent", mass="voronoi")
    L_rob, _ = sk.laplacian(s, method="robust")
    np.testing.assert_allclose(M_bary.diagonal(), s.vertex_areas)
    np.testing.assert_allclose(M_vor.diagonal(), s.voronoi_areas)
    assert abs(L - L_rob).max() > 0  # jittered points: not intrinsic-Delaunay everywhere


# ------------------------------------------------------------ one threshold
def _with_needle(angle_deg: float) -> sk.Surface:
    """A planar fan around a centre with one thin triangle of the given apex angle."""
    angles = np.deg2rad(np.r_[0.0, angle_deg, np.linspace(angle_deg + 60, 300, 5)])
    rim = np.c_[np.cos(angles), np.sin(angles), np.zeros(len(angles))]
    v = np.vstack([[0.0, 0.0, 0.0], rim])
    k = len(rim)
    f = np.array([[0, 1 + i, 1 + (i + 1) % k] for i in range(k)])
    return sk.Surface(v, f)


def test_needle_threshold_is_shared_by_laplacian_and_quality_report():
    thin = _with_needle(0.6 * NEEDLE_ANGLE_DEGREES)
    fine = _with_needle(1.5 * NEEDLE_ANGLE_DEGREES)
    for s, flagged in ((thin, True), (fine, False)):
        warned = any("needle" in w for w in sk.quality_report(s).warnings)
        assert warned is flagged
        assert (needs_robust_laplacian(s) is not None) is flagged


def test_degenerate_faces_shared_by_laplacian_and_repair():
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [1, 1, 0], [2, 0, 0]], float)
    f = np.array([[0, 1, 2], [1, 3, 2], [0, 1, 4]])  # the last one is collinear
    s = sk.Surface(v, f)
    assert s.degenerate_faces.tolist() == [False, False, True]
    assert "degenerate" in needs_robust_laplacian(s)
    assert mesh_quality.degenerate_faces(v, f).tolist() == [False, False, True]
    assert sk.quality_report(s).n_degenerate_faces == 1


# ------------------------------------------------------------ faces to vertices
def test_face_to_vertex_operators():
    s = sk.synthetic.ellipsoid((3.0, 2.0, 1.0), n=600)
    F = face_to_vertex_matrix(s)
    np.testing.assert_allclose(F @ np.ones(s.n_faces), s.vertex_areas)
    unit = face_to_vertex_matrix(s, unit_area=True)
    assert (unit @ np.ones(s.n_faces)).sum() == pytest.approx(1.0)
    np.testing.assert_allclose(face_to_vertex_mean(s, np.full(s.n_faces, 2.5)), 2.5)
    # a value on one face reaches exactly its three corners
    one = np.zeros(s.n_faces)
    one[7] = 1.0
    assert set(np.flatnonzero(face_to_vertex_mean(s, one))) == set(s.faces[7])


# ------------------------------------------------------------ sampling
def test_farthest_points_greedy_loop():
    """Gonzalez 1985: each new point is the farthest from those chosen."""
    x = np.c_[np.arange(11.0), np.zeros(11), np.zeros(11)]
    chosen = farthest_points(x, 3, seed=0, exact=True)
    first = chosen[0]
    expected_second = 0 if first >= 5 else 10  # ties go to the lowest index
    assert chosen[1] == expected_second
    assert np.array_equal(chosen, farthest_points(x, 3, seed=0, exact=True))
    samples, nearest = greedy_farthest(5, 3, lambda i: np.abs(x[:, 0] - x[i, 0]))
    assert samples.tolist() == [5, 0, 10] and nearest.max() == 2.0  # ties: lowest index
