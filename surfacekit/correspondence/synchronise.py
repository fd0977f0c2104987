"""Cycle-consistent maps along a series of scans of one organ, synchronised through the baseline.

A series of scans S_0 (the baseline), S_1, ..., S_{n-1} is matched pairwise: the
baseline to each scan (0 -> i) and each scan to the next in time (i -> i+1).
Pairwise maps found independently disagree around a cycle: going 0 -> i -> i+1
does not land where 0 -> i+1 does.  Map networks are made consistent by
expressing every map through one common domain (Huang & Guibas, "Consistent
shape maps via semidefinite programming", Symposium on Geometry Processing 2013;
Huang, Wang & Guibas, "Functional map networks for analyzing and exploring large
shape collections", ACM Transactions on Graphics 33(4), 2014): a network whose
maps all factor through one shape, ``i -> j = (0 -> j) o (0 -> i)^-1``, is
cycle-consistent by construction.  Here the common domain is the subject's
baseline, and each baseline map is refined by the evidence of the neighbour maps
before the network is built from them (this library's choice):

1. every vertex map is lifted to sub-vertex points (:func:`lift_map`): its
   displacement field, taken in the target frame after the correspondence's rigid
   pose, is averaged over each source vertex's one-ring and the displaced point is
   projected onto the target near its matched vertex (as steps 2-3 of
   ``measure_change``, with a one-ring average instead of heat smoothing);
2. in time order, the baseline map of scan i is the mean of the direct map 0 -> i
   and the composition (0 -> i-1, synchronised) then (i-1 -> i), projected onto
   S_i, wherever the two agree within :data:`AGREEMENT_LIMIT` of sqrt(area); where
   they disagree, the direct map is kept (one of them is wrong, and the direct one
   needs no chain of matches);
3. the maps between scans are those of the network, ``P_j o P_i^-1``, with the
   inverse found by locating each vertex of S_i on the baseline triangles carried to
   S_i by P_i.

:func:`cycle_errors` measures the remaining disagreement around each cycle
0 -> i -> i+1 versus 0 -> i+1 as the mean distance on S_{i+1} divided by
sqrt(area of S_{i+1}), for the raw pairwise vertex maps and for the synchronised maps.
The synchronised network agrees around every cycle by construction except for what
storing its maps on the vertices of each scan loses (interpolation and inversion), so
its cycle error measures that loss; the raw figure is the disagreement between the
independent matches that synchronisation removed.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from ..mesh.proximity import nearest_corner, ring_faces
from ..mesh.surface import Surface
from .closest import closest_near
from .result import Correspondence


@dataclass(frozen=True)
class PointMap:
    """A map from the vertices of a source surface to points on a target surface.

    Attributes
    ----------
    face : (n_source,) int, the target face holding each image point
    barycentric : (n_source, 3) barycentric coordinates of the point in that face
    """

    face: np.ndarray
    barycentric: np.ndarray

    def points(self, target: Surface) -> np.ndarray:
        """(n_source, 3) image points on `target` (mm, in the target's frame)."""
        corners = target.vertices[target.faces[self.face]]
        return np.einsum("nk,nkd->nd", self.barycentric, corners)

    def vertex_map(self, target: Surface) -> np.ndarray:
        """(n_source,) int, the target vertex nearest each image point (a corner of its face)."""
        return nearest_corner(self.points(target), target.vertices, target.faces, self.face)


#: two estimates of a baseline point on a scan are averaged when closer than this
#: fraction of sqrt(area); farther apart, one of them is wrong and the direct map is kept
#: (0.05 is the "poor" round-trip error of this library's map notes)
AGREEMENT_LIMIT = 0.05
#: rings of the target searched around a seed vertex when projecting a point
PROJECTION_RINGS = 2


def barycentric_coordinates(points: np.ndarray, triangles: np.ndarray) -> np.ndarray:
    """(n, 3) barycentric coordinates of points (n, 3) in triangles (n, 3, 3), by the
    normal equations of the two edge vectors (exact for points in the triangle's plane);
    clipped to the triangle and normalised."""
    a, b, c = triangles[:, 0], triangles[:, 1], triangles[:, 2]
    e1, e2, d = b - a, c - a, points - a
    d11, d12, d22 = (np.einsum("ij,ij->i", x, y) for x, y in ((e1, e1), (e1, e2), (e2, e2)))
    r1, r2 = np.einsum("ij,ij->i", d, e1), np.einsum("ij,ij->i", d, e2)
    det = d11 * d22 - d12 * d12
    safe = np.where(np.abs(det) > 0, det, 1.0)
    v = np.where(np.abs(det) > 0, (d22 * r1 - d12 * r2) / safe, 1.0 / 3.0)
    w = np.where(np.abs(det) > 0, (d11 * r2 - d12 * r1) / safe, 1.0 / 3.0)
    bary = np.clip(np.stack([1.0 - v - w, v, w], axis=1), 0.0, None)
    total = bary.sum(axis=1, keepdims=True)
    return np.where(total > 0, bary / np.where(total > 0, total, 1.0), 1.0 / 3.0)


def locate(points: np.ndarray, target: Surface, seeds: np.ndarray,
           rings: int = PROJECTION_RINGS) -> PointMap:
    """Project points (n, 3) onto `target` near the seed vertices (n,): the closest point on
    the faces touching the `rings`-ring of each seed (Ericson, *Real-Time Collision
    Detection*, 2005, §5.1.5), as a :class:`PointMap`."""
    foot, face = closest_near(points, target.vertices, target.faces, ring_faces(target, rings),
                              seeds, target.connectivity.vertex_adjacency(self_loops=True))
    bary = barycentric_coordinates(foot, target.vertices[target.faces[face]])
    return PointMap(face=face, barycentric=bary)


def lift_map(source: Surface, target: Surface, corr: Correspondence) -> PointMap:
    """The vertex map source -> target of `corr` as sub-vertex points on the target.

    The displacement of each source vertex to its matched target vertex, after the
    correspondence's rigid pose (``corr.rigid``; none: the identity), is averaged
    over the vertex's one-ring (which removes the staircase of a vertex-to-vertex map),
    and the displaced point is projected onto the target triangles around the matched
    vertex, so it lies exactly on the target.
    """
    s2t = corr.source_to_target
    if s2t.shape != (source.n_vertices,) or corr.n_target != target.n_vertices:
        raise ValueError(f"correspondence maps {s2t.shape[0]} -> {corr.n_target} vertices, the "
                         f"surfaces have {source.n_vertices} and {target.n_vertices}")
    moved = corr.rigid.apply(source.vertices) if corr.rigid is not None else source.vertices
    ring = source.connectivity.vertex_adjacency(self_loops=True).tocsr().astype(np.float64)
    ring.data[:] = 1.0
    mean = ring.multiply(1.0 / np.asarray(ring.sum(axis=1))).tocsr()
    displacement = mean @ (target.vertices[s2t] - moved)
    return locate(moved + displacement, target, s2t)


def compose(first: PointMap, middle: Surface, second: PointMap, target: Surface) -> PointMap:
    """``second o first``: a point of `first` on `middle` is carried by interpolating
    `second`'s images of its face corners (barycentrically), then projected onto `target`."""
    corners = second.points(target)[middle.faces[first.face]]           # (n, 3, 3)
    pts = np.einsum("nk,nkd->nd", first.barycentric, corners)
    seeds = second.vertex_map(target)[middle.faces[first.face, np.argmax(first.barycentric, 1)]]
    return locate(pts, target, seeds)


def _refine(direct: PointMap, via: PointMap, target: Surface) -> tuple[PointMap, float]:
    """Mean of two estimates where they agree, else the direct one; and the share averaged."""
    a, b = direct.points(target), via.points(target)
    agree = np.linalg.norm(a - b, axis=1) <= AGREEMENT_LIMIT * np.sqrt(target.area)
    pts = np.where(agree[:, None], 0.5 * (a + b), a)
    return locate(pts, target, direct.vertex_map(target)), float(np.mean(agree))


def invert(forward: PointMap, source: Surface, target: Surface) -> PointMap:
    """The inverse of a source -> target point map, from the vertices of `target` to points
    on `source`: each target vertex is located on the source triangles carried to the target
    by `forward` (the baseline mesh laid over the scan), and its barycentric coordinates
    there are read back on the source."""
    carried = Surface(forward.points(target), source.faces)
    seeds = cKDTree(carried.vertices).query(target.vertices)[1]
    on_carried = locate(target.vertices, carried, seeds)
    return PointMap(face=on_carried.face, barycentric=on_carried.barycentric)


def synchronise(surfaces: list[Surface], direct: list[PointMap | None],
                neighbours: list[PointMap | None]) -> tuple[list[PointMap | None], list[float]]:
    """Baseline maps of a series refined through their neighbours (steps 1-2 of the module notes).

    Parameters
    ----------
    surfaces : scans in time order, the baseline first
    direct : ``direct[i]`` the lifted map baseline -> scan i (None for i = 0)
    neighbours : ``neighbours[i]`` the lifted map scan i -> scan i+1 (None where missing)

    Returns
    -------
    (maps, agreement) : ``maps[i]`` the synchronised baseline -> scan i map (None for 0);
    ``agreement[i]`` the share of baseline vertices where both estimates were averaged
    (1.0 for scan 1, which has only its direct map; NaN for the baseline)
    """
    out: list[PointMap | None] = [None] * len(surfaces)
    agreement = [float("nan")] * len(surfaces)
    for i in range(1, len(surfaces)):
        out[i], agreement[i] = direct[i], 1.0
        previous = neighbours[i - 1] if i >= 2 else None
        if previous is not None and out[i - 1] is not None:
            via = compose(out[i - 1], surfaces[i - 1], previous, surfaces[i])
            out[i], agreement[i] = _refine(direct[i], via, surfaces[i])
    return out, agreement


def _network_map(maps: list[PointMap | None], surfaces: list[Surface], i: int, j: int) -> PointMap:
    """The network's map scan i -> scan j, ``P_j o P_i^-1`` (step 3), on the vertices of S_i."""
    back = invert(maps[i], surfaces[0], surfaces[i])
    return compose(back, surfaces[0], maps[j], surfaces[j])


def cycle_errors(surfaces: list[Surface], raw_direct: list[np.ndarray | None],
                 raw_neighbours: list[np.ndarray | None],
                 maps: list[PointMap | None]) -> dict:
    """Mean cycle error of the triangles 0 -> i -> i+1 against 0 -> i+1, per sqrt(area).

    For the raw vertex maps (``raw_direct[i]`` baseline -> i, ``raw_neighbours[i]``
    i -> i+1, (n,) int each) the composition runs through vertex indices; for the
    synchronised maps through the network's map i -> i+1 stored on the vertices of S_i
    and interpolated barycentrically.  Each error is the mean Euclidean distance on
    S_{i+1} over the baseline vertices divided by sqrt(area of S_{i+1}) (distances are
    normalised by sqrt(area) as in Kim, Lipman & Funkhouser, SIGGRAPH 2011).

    Returns ``{"raw": [...], "synchronised": [...], "raw_mean": float,
    "synchronised_mean": float}`` with one value per cycle (NaN means when a series has
    fewer than three scans or a neighbour map is missing).
    """
    raw, sync = [], []
    for i in range(1, len(surfaces) - 1):
        nxt = surfaces[i + 1]
        scale = float(np.sqrt(nxt.area))
        if raw_neighbours[i] is not None:
            composed = nxt.vertices[raw_neighbours[i][raw_direct[i]]]
            raw.append(float(np.mean(np.linalg.norm(composed - nxt.vertices[raw_direct[i + 1]],
                                                    axis=1))) / scale)
        step = _network_map(maps, surfaces, i, i + 1)
        composed = compose(maps[i], surfaces[i], step, nxt).points(nxt)
        sync.append(float(np.mean(np.linalg.norm(composed - maps[i + 1].points(nxt), axis=1)))
                    / scale)
    return {"raw": raw, "synchronised": sync,
            "raw_mean": float(np.mean(raw)) if raw else float("nan"),
            "synchronised_mean": float(np.mean(sync)) if sync else float("nan")}
