"""Closest points on a surface near known vertices: ring neighbourhoods, point-to-triangle
projection, and the outward normals along which offsets are measured."""
from __future__ import annotations

import numpy as np
import scipy.sparse as sp
from trimesh import triangles

from .surface import Surface


def ring_faces(s: Surface, rings: int) -> sp.csr_matrix:
    """(n, m) 0/1: faces touching the `rings`-ring of each vertex (rings >= 0)."""
    reach = sp.identity(s.n_vertices, format="csr")
    adj = s.connectivity.vertex_adjacency(self_loops=True)
    for _ in range(rings):
        reach = reach @ adj
        reach.data[:] = 1.0
    out = (reach @ s.connectivity.vertex_faces).tocsr()
    out.data[:] = 1.0
    return out


def near_faces(s: Surface, seeds: np.ndarray, rings: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """Candidate (query, face) pairs: faces touching the `rings`-ring of each seed vertex.

    Returns query indices (sorted ascending) and face indices, both (p,).
    """
    near = ring_faces(s, rings)[np.asarray(seeds)].tocsr()
    near.sort_indices()
    qi = np.repeat(np.arange(near.shape[0]), np.diff(near.indptr))
    return qi, near.indices.astype(np.int64)


def project_pairs(points: np.ndarray, vertices: np.ndarray, faces: np.ndarray,
                  pairs: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """Closest point to each query point among its candidate faces (see `near_faces`), (k, 3)."""
    return closest_on_faces(points, vertices, faces, pairs)[0]


def closest_on_faces(points: np.ndarray, vertices: np.ndarray, faces: np.ndarray,
                     pairs: tuple[np.ndarray, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Closest point to each query point among its candidate faces, and the face it lies on.

    The point on each candidate triangle comes from trimesh's vectorised
    Voronoi-region method (Ericson, *Real-Time Collision Detection*, Morgan
    Kaufmann 2005, §5.1.5); the nearest candidate wins (the first one on ties).
    """
    qi, fi = pairs
    cand = triangles.closest_point(vertices[faces[fi]], points[qi])
    d2 = np.sum((cand - points[qi]) ** 2, axis=1)
    # older trimesh releases return NaN on triangles with two coincident corners:
    # such a candidate never wins while the query has another
    d2[~np.isfinite(d2)] = np.inf
    new_query = np.r_[True, qi[1:] != qi[:-1]]
    segment = np.cumsum(new_query) - 1
    is_min = d2 == np.minimum.reduceat(d2, np.flatnonzero(new_query))[segment]
    hit = np.flatnonzero(is_min)
    _, first = np.unique(qi[hit], return_index=True)  # first minimum of each query
    best = hit[first]
    out = np.empty((len(points), 3))
    out[qi[best]] = cand[best]
    face = np.full(len(points), -1, dtype=np.int64)
    face[qi[best]] = fi[best]
    return out, face


def nearest_corner(points: np.ndarray, vertices: np.ndarray, faces: np.ndarray,
                   face: np.ndarray) -> np.ndarray:
    """For each point (n, 3) on its face (n,), the index of the face's nearest corner."""
    corners = faces[face]
    d2 = np.sum((vertices[corners] - points[:, None, :]) ** 2, axis=2)
    return corners[np.arange(len(points)), np.argmin(d2, axis=1)]


def outward_vertex_normals(s: Surface) -> np.ndarray:
    """(n, 3) unit vertex normals, flipped if the surface is wound inward (negative volume),
    so that point-to-plane offsets along them are positive outside a closed surface."""
    n = np.asarray(s.vertex_normals)
    if s.is_closed and s.signed_volume < 0:
        return -n
    return n
