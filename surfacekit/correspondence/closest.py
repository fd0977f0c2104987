"""Closest points on a surface near known vertices, in bounded memory and with the far
candidate faces skipped.

The same answer as :func:`~surfacekit.mesh.proximity.closest_on_faces` over the faces
touching the ring around each seed vertex (:func:`~surfacekit.mesh.proximity.near_faces`),
bit for bit, but computed over blocks of queries (memory does not grow with the number
of candidate pairs) and only on the candidate faces that can hold the closest point.
"""
from __future__ import annotations

import numpy as np
import scipy.sparse as sp

from ..mesh.proximity import closest_on_faces

#: queries per block: the candidate pairs of one block (about 10-60 per query) and
#: their temporaries stay in the tens of megabytes
BLOCK = 4096
#: relative margin kept on the pruning bound, far above the rounding of the distances
#: (about 1e-16 of the coordinates) so that no face that could win or tie is skipped
MARGIN = 1e-9


def closest_near(points: np.ndarray, vertices: np.ndarray, faces: np.ndarray,
                 near: sp.csr_matrix, seeds: np.ndarray,
                 adjacency: sp.csr_matrix) -> tuple[np.ndarray, np.ndarray]:
    """Closest point to each query among the faces ``near[seed]`` lists, and its face.

    points (k, 3); vertices (n, 3) and faces (m, 3) of the surface searched; near:
    the (n, m) table of candidate faces per vertex
    (:func:`~surfacekit.mesh.proximity.ring_faces`); seeds (k,) vertex of each query;
    adjacency: the surface's (n, n) vertex adjacency with the diagonal
    (``Connectivity.vertex_adjacency(self_loops=True)``).  Returns ``(foot (k, 3),
    face (k,))``, identical to ``closest_on_faces(points, vertices, faces,
    near_faces(surface, seeds, rings))``.

    A candidate face is skipped when a lower bound of its distance exceeds an upper
    bound of the closest distance, so that it can neither win nor tie (the
    branch-and-bound pruning of bounding-volume searches, Ericson, *Real-Time
    Collision Detection*, Morgan Kaufmann 2005, §6.1).  The lower bound: the
    distance h to the face's plane and the in-plane distance to its circumscribing
    disc (centroid c, largest centroid-corner distance r) make up
    ``sqrt(h² + max(0, sqrt(|p - c|² - h²) - r)²)``.  The upper bound: the distance
    to the nearest candidate centroid, or to the seed or one of its neighbours
    (points on candidate faces).  The closest point on each remaining face is
    Ericson's §5.1.5 method.
    """
    points = np.asarray(points, dtype=np.float64)
    seeds = np.asarray(seeds, dtype=np.int64)
    corners = vertices[faces]
    centre = corners.mean(axis=1)
    radius = np.sqrt(np.max(np.einsum("fkd,fkd->fk", corners - centre[:, None], corners - centre[:, None]),
                            axis=1))
    normal = np.cross(corners[:, 1] - corners[:, 0], corners[:, 2] - corners[:, 0])
    length = np.linalg.norm(normal, axis=1, keepdims=True)
    normal = np.divide(normal, length, out=np.zeros_like(normal), where=length > 0)
    size = max(float(np.abs(points).max(initial=0.0)), float(np.abs(vertices).max(initial=0.0)))
    faces_near = (centre, radius + MARGIN * (radius + size), normal, MARGIN * size)
    near.sort_indices()  # once; rows taken from it keep the order
    foot = np.empty((len(points), 3))
    face = np.empty(len(points), dtype=np.int64)
    for lo in range(0, len(points), BLOCK):
        part = slice(lo, lo + BLOCK)
        corner = _nearest_vertex_distance(points[part], vertices, adjacency[seeds[part]])
        pairs = _pruned_pairs(points[part], faces_near, near[seeds[part]], corner)
        foot[part], face[part] = closest_on_faces(points[part], vertices, faces, pairs)
    return foot, face


def _nearest_vertex_distance(points: np.ndarray, vertices: np.ndarray,
                             rows: sp.csr_matrix) -> np.ndarray:
    """Distance from each point to the nearest vertex its row lists (every row non-empty)."""
    qi = np.repeat(np.arange(rows.shape[0]), np.diff(rows.indptr))
    diff = points[qi] - vertices[rows.indices]
    return np.minimum.reduceat(np.sqrt(np.einsum("ij,ij->i", diff, diff)), rows.indptr[:-1])


def _pruned_pairs(points: np.ndarray, faces_near: tuple, rows: sp.csr_matrix,
                  corner: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(query, face) candidate pairs of one block, in the order of `near_faces`, without
    the faces that lie farther than the nearest candidate centroid or than `corner`, the
    distance to a candidate corner.  faces_near: per face centroid, radius (with the
    rounding margin), unit normal, and the absolute rounding margin."""
    centre, radius, normal, tol = faces_near
    rows.sort_indices()  # a no-op check when `near` was sorted
    qi = np.repeat(np.arange(rows.shape[0]), np.diff(rows.indptr))
    fi = rows.indices.astype(np.int64)
    if not len(fi):
        return qi, fi
    diff = points[qi] - centre[fi]
    d2 = np.einsum("ij,ij->i", diff, diff)
    # a smaller h only lowers the bound, so the margin is taken off h
    h = np.maximum(np.abs(np.einsum("ij,ij->i", diff, normal[fi])) - tol, 0.0)
    in_plane = np.maximum(np.sqrt(np.maximum(d2 - h * h, 0.0)) - radius[fi], 0.0)
    lower = np.sqrt(h * h + in_plane * in_plane)
    new_query = np.r_[True, qi[1:] != qi[:-1]]
    upper = np.minimum(np.minimum.reduceat(np.sqrt(d2), np.flatnonzero(new_query)),
                       corner[qi[new_query]])[np.cumsum(new_query) - 1]
    keep = lower <= upper * (1.0 + MARGIN) + tol
    return qi[keep], fi[keep]
