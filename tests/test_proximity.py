"""Closest points near known vertices (surfacekit.mesh.proximity)."""
import numpy as np

import surfacekit as sk
from surfacekit.mesh.proximity import (
    closest_on_faces,
    near_faces,
    nearest_corner,
    outward_vertex_normals,
    project_pairs,
    ring_faces,
)


def _segment_closest(p, a, c):
    """Closest point of segment ac to p (elementary geometry: clamped projection)."""
    d = c - a
    t = np.clip(np.einsum("ij,ij->i", p - a, d) / np.einsum("ij,ij->i", d, d), 0.0, 1.0)
    return a + t[:, None] * d


def test_triangles_with_coincident_corners_project_onto_their_segment():
    """A triangle whose corners a and b coincide is the segment ac; one whose corners are
    collinear is the segment between its extreme corners."""
    rng = np.random.default_rng(0)
    a, c, p = rng.normal(size=(3, 200, 3))
    faces = np.arange(600).reshape(200, 3)
    collapsed = np.stack([a, a, c], axis=1).reshape(-1, 3)
    pairs = (np.arange(200), np.arange(200))
    q = project_pairs(p, collapsed, faces, pairs)
    np.testing.assert_allclose(q, _segment_closest(p, a, c), atol=1e-12)
    collinear = np.stack([a, 0.5 * (a + c), c], axis=1).reshape(-1, 3)
    q = project_pairs(p, collinear, faces, pairs)
    np.testing.assert_allclose(np.linalg.norm(q - p, axis=1),
                               np.linalg.norm(_segment_closest(p, a, c) - p, axis=1), atol=1e-12)


def test_nearest_candidate_wins():
    """A point straight out from a vertex of a convex polyhedron inscribed in a sphere is
    closest to that vertex (the radial direction lies in the vertex's normal cone; convex
    geometry), whichever of the candidate faces around it is tried first."""
    s = sk.synthetic.icosphere(3, radius=10.0)
    p = s.vertices * 1.05
    q = project_pairs(p, s.vertices, s.faces, near_faces(s, np.arange(s.n_vertices), rings=1))
    np.testing.assert_allclose(q, s.vertices, atol=1e-9)


def test_ring_faces_on_a_regular_patch():
    """On a regular triangulation (valence 6), the faces touching a vertex are 6 and those
    touching its 1-ring are the 24 triangles of a side-2 hexagon (triangular lattice)."""
    s = sk.synthetic.icosphere(3)
    valence = np.bincount(s.edges.ravel(), minlength=s.n_vertices)
    adj = s.connectivity.vertex_adjacency()
    regular = np.flatnonzero([valence[i] == 6 and np.all(valence[adj[i].indices] == 6)
                              for i in range(s.n_vertices)])
    v = regular[0]
    assert ring_faces(s, 0)[v].nnz == 6
    assert ring_faces(s, 1)[v].nnz == 24


def test_outward_normals_of_an_inward_wound_sphere():
    s = sk.synthetic.icosphere(2)
    inward = sk.Surface(s.vertices, s.faces[:, ::-1])
    for surf in (s, inward):
        n = outward_vertex_normals(surf)
        assert np.all(np.einsum("ij,ij->i", n, surf.vertices) > 0)


def test_closest_point_names_its_face_and_nearest_corner():
    """The closest point returned lies on the face returned (its distance to that face alone
    is zero), and the corner named is the nearest of that face's three."""
    s = sk.synthetic.icosphere(3, radius=10.0)
    p = s.vertices * 1.05 + np.random.default_rng(1).normal(0, 0.3, s.vertices.shape)
    pairs = near_faces(s, np.arange(s.n_vertices), rings=1)
    foot, face = closest_on_faces(p, s.vertices, s.faces, pairs)
    np.testing.assert_array_equal(foot, project_pairs(p, s.vertices, s.faces, pairs))
    alone = project_pairs(foot, s.vertices, s.faces, (np.arange(len(p)), face))
    np.testing.assert_allclose(alone, foot, atol=1e-9)
    corner = nearest_corner(foot, s.vertices, s.faces, face)
    d = np.linalg.norm(s.vertices[s.faces[face]] - foot[:, None], axis=2)
    assert np.all(np.any(s.faces[face] == corner[:, None], axis=1))
    np.testing.assert_allclose(np.linalg.norm(s.vertices[corner] - foot, axis=1), d.min(axis=1))
