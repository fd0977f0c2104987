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
                 near: sp.csr_matrix, seeds: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Closest point to each query among the faces ``near[seed]`` lists, and its face.

    points (k, 3); vertices (n, 3) and faces (m, 3) of the surface searched; near:
    the (n, m) table of candidate faces per vertex
    (:func:`~surfacekit.mesh.proximity.ring_faces`); seeds (k,) vertex of each query.
    Returns ``(foot (k, 3), face (k,))``, identical to ``closest_on_faces(points,
    vertices, faces, near_faces(surface, seeds, rings))``.

    A candidate face is skipped when a lower bound of its distance, the distance to
    its circumscribing ball (centroid, largest centroid-corner distance), exceeds an
    upper bound of the closest distance, the distance to the nearest candidate
    centroid (a point on the surface): such a face can neither win nor tie (the
    branch-and-bound pruning of bounding-volume searches, Ericson, *Real-Time
    Collision Detection*, Morgan Kaufmann 2005, §6.1).  The closest point on each
    remaining face is Ericson's §5.1.5 method.
    """
    points = np.asarray(points, dtype=np.float64)
    seeds = np.asarray(seeds, dtype=np.int64)
    corners = vertices[faces]
    centre = corners.mean(axis=1)
    radius = np.sqrt(np.max(np.einsum("fkd,fkd->fk", corners - centre[:, None], corners - centre[:, None]),
                            axis=1))
    size = max(float(np.abs(points).max(initial=0.0)), float(np.abs(vertices).max(initial=0.0)))
    slack = radius * MARGIN + size * MARGIN
    near.sort_indices()  # once; rows taken from it keep the order
    foot = np.empty((len(points), 3))
    face = np.empty(len(points), dtype=np.int64)
    for lo in range(0, len(points), BLOCK):
        part = slice(lo, lo + BLOCK)
        pairs = _pruned_pairs(points[part], centre, radius + slack, near[seeds[part]])
        foot[part], face[part] = closest_on_faces(points[part], vertices, faces, pairs)
    return foot, face


def _pruned_pairs(points: np.ndarray, centre: np.ndarray, radius: np.ndarray,
                  rows: sp.csr_matrix) -> tuple[np.ndarray, np.ndarray]:
    """(query, face) candidate pairs of one block, in the order of `near_faces`, without
    the faces whose ball (centre, radius) lies farther than the nearest candidate centre."""
    rows.sort_indices()  # a no-op check when `near` was sorted
    qi = np.repeat(np.arange(rows.shape[0]), np.diff(rows.indptr))
    fi = rows.indices.astype(np.int64)
    if not len(fi):
        return qi, fi
    diff = points[qi] - centre[fi]
    dist = np.sqrt(np.einsum("ij,ij->i", diff, diff))
    new_query = np.r_[True, qi[1:] != qi[:-1]]
    upper = np.minimum.reduceat(dist, np.flatnonzero(new_query))[np.cumsum(new_query) - 1]
    keep = dist - radius[fi] <= upper * (1.0 + MARGIN)
    return qi[keep], fi[keep]
