"""The tube route: matching elongated, strongly bent organs (bowel segments, ureters, vessels).

A rigid pose cannot bring a tube bent by 90 degrees onto a straight one, so the
extrinsic candidates fail there, and on a nearly round tube the intrinsic
descriptors hardly tell one side from the other.  This route removes the bend
instead: the two ends of each surface are found intrinsically, as the pair of
vertices farthest apart along the surface (a double sweep of heat-method geodesic
distances, Crane, Weischedel & Wardetzky, ACM TOG 2013); the geodesic distances to
them give rings around the tube whose centroids trace its centreline; every vertex
is then written in coordinates along that centreline (arc length) and across it
(in frames carried along by parallel transport).  The solver's own candidate
search (extrinsic poses, the intrinsic functional map, smooth deformation, ZoomOut)
runs on the two straightened tubes, and the same unsupervised selection energy
decides whether the result replaces the direct match.  Both ways of pairing the
ends are among the poses tried.
"""
from __future__ import annotations

import warnings
from dataclasses import replace

import numpy as np
from scipy.interpolate import make_smoothing_spline
from scipy.spatial import cKDTree

from ..mesh.geodesics import geodesic_distance
from ..mesh.surface import Surface
from . import extrinsic as ex
from . import tuning
from .alignment import Transform, kabsch
from .candidates import Candidate, energy, pose_residual
from .options import MatchOptions
from .shapes import ShapeState
from .zoomout import nearest_rows


def tube_ends(shape: ShapeState) -> tuple[int, int, np.ndarray, np.ndarray]:
    """The two extremities of a surface: a double sweep of geodesic distance (farthest vertex
    from vertex 0, then the farthest from that).  Returns ``(a, b, d_a, d_b)`` with the
    distances (n,) from each end, in units of sqrt(area)."""
    s = shape.surface
    a = int(np.argmax(geodesic_distance(s, 0)))
    d_a = geodesic_distance(s, a)
    b = int(np.argmax(d_a))
    d_b = geodesic_distance(s, b)
    root = np.sqrt(s.area)
    return a, b, d_a / root, d_b / root


def tubularity(shape: ShapeState, ends) -> float:
    """Geodesic length of the surface (distance between its ends) over sqrt(area): about 1.4 for
    a tube five times as long as it is wide, 0.9 for a kidney, 0.8 for a liver lobe."""
    return float(ends[2][ends[1]])


def fitted_candidate(src: ShapeState, tgt: ShapeState, t2s: np.ndarray, s2t: np.ndarray,
                     route: str) -> Candidate:
    """A candidate whose pose (Kabsch) and smooth displacement (least squares in the source's
    low eigenfunctions) carry each source sample to its partner under the sample map `s2t`."""
    goal = tgt.sp[s2t]
    R, t, _ = kabsch(src.sp, goal)
    pose = Transform(R, t)
    moved = pose.apply(src.sp)
    k = min(tuning.TUBE_DEFORM_K, src.sphi.shape[1])
    B = src.sphi[:, :k]
    reg = tuning.TUBE_DEFORM_STIFFNESS * len(B) * np.diag(src.values[:k])
    A = np.linalg.solve(B.T @ B + reg, B.T @ (goal - moved))
    coords = moved + B @ A
    return Candidate(route, pose, np.eye(3), np.zeros(3), A, coords, nearest_rows(tgt.sp, coords),
                     pose_residual(src, tgt, pose), s2t=nearest_rows(coords, tgt.sp))


def centreline(shape: ShapeState, along: np.ndarray) -> np.ndarray:
    """Points along the tube's axis, (m, 3) in the shape's unit-size frame: area-weighted
    centroids of the rings of vertices with equal `along` (n,) (a coordinate that grows
    from one end to the other), smoothed by a penalised spline and resampled finely."""
    n_bins = tuning.TUBE_CENTRELINE_BINS
    u = (along - along.min()) / max(np.ptp(along), 1e-300)
    bins = np.minimum((u * n_bins).astype(int), n_bins - 1)
    w = shape.weights
    mass = np.bincount(bins, weights=w, minlength=n_bins)
    keep = mass > 0
    cent = np.stack([np.bincount(bins, weights=w * shape.points[:, i], minlength=n_bins)
                     for i in range(3)], axis=1)[keep] / mass[keep, None]
    t = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(cent, axis=0), axis=1))])
    fine = np.linspace(0.0, t[-1], tuning.TUBE_CENTRELINE_POINTS)
    lam = tuning.TUBE_CENTRELINE_SMOOTHING * t[-1] ** 3
    return np.stack([make_smoothing_spline(t, cent[:, i], lam=lam)(fine) for i in range(3)], axis=1)


def transported_frames(line: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unit tangents (m-1, 3) of the polyline's segments and normals/binormals carried along
    without twist (parallel transport: each normal turned by the least rotation that takes
    one tangent to the next, Bishop, "There is more than one way to frame a curve", 1975)."""
    T = np.diff(line, axis=0)
    T /= np.maximum(np.linalg.norm(T, axis=1), 1e-300)[:, None]
    N = np.empty_like(T)
    seed = np.eye(3)[int(np.argmin(np.abs(T[0])))]
    N[0] = seed - (seed @ T[0]) * T[0]
    N[0] /= np.linalg.norm(N[0])
    for j in range(1, len(T)):
        n = N[j - 1] - (N[j - 1] @ T[j]) * T[j]
        N[j] = n / max(np.linalg.norm(n), 1e-300)
    return T, N, np.cross(T, N)


def straighten(points: np.ndarray, line: np.ndarray, *, block: int = 8192) -> np.ndarray:
    """Points (n, 3) in the frame of the straightened tube: arc length along the centreline
    `line` (m, 3) to the closest point, then the offset from it in the transported frame.
    Done `block` points at a time (memory ~ block x m)."""
    T, N, B = transported_frames(line)
    seg = np.diff(line, axis=0)
    length = np.linalg.norm(seg, axis=1)
    arc = np.concatenate([[0.0], np.cumsum(length)])
    lo = np.where(np.arange(len(seg)) == 0, -np.inf, 0.0)
    hi = np.where(np.arange(len(seg)) == len(seg) - 1, np.inf, 1.0)
    out = np.empty((len(points), 3))
    for start in range(0, len(points), block):
        rel = points[start:start + block, None, :] - line[None, :-1, :]  # (b, m-1, 3)
        t = np.einsum("nmd,md->nm", rel, seg) / np.maximum(length**2, 1e-300)
        t = np.clip(t, lo, hi)  # the end segments extend beyond the line (into the end caps)
        off = rel - t[:, :, None] * seg[None]
        j = np.argmin(np.einsum("nmd,nmd->nm", off, off), axis=1)
        rows = np.arange(len(j))
        o = off[rows, j]
        out[start:start + block, 0] = arc[j] + t[rows, j] * length[j] + np.einsum("nd,nd->n", o, T[j])
        out[start:start + block, 1] = np.einsum("nd,nd->n", o, N[j])
        out[start:start + block, 2] = np.einsum("nd,nd->n", o, B[j])
    return out


def straightened(shape: ShapeState, ends) -> ShapeState:
    """The solver's state of the same surface with its tube straightened (see :func:`straighten`);
    spectrum, descriptors and samples are the surface's own (they do not change with bending).

    The first centreline joins the centroids of the rings of equal relative geodesic
    distance to the two ends; these rings lean on a bent tube (its inner side is
    shorter), so the centreline is then redrawn from rings of equal arc length along
    the previous one, `TUBE_CENTRELINE_ROUNDS` times."""
    _, _, d_a, d_b = ends
    flat = straighten(shape.points, centreline(shape, d_a / np.maximum(d_a + d_b, 1e-300)))
    for _ in range(tuning.TUBE_CENTRELINE_ROUNDS):  # rings across the axis, not of geodesic distance
        flat = straighten(shape.points, centreline(shape, flat[:, 0]))
    flat = Surface(flat / shape.scale, shape.surface.faces)
    pts, centroid, scale = ex.normalized_coordinates(flat)
    return replace(shape, surface=flat, points=pts, centroid=centroid, scale=scale,
                   weights=flat.vertex_areas / flat.area, tree=cKDTree(pts))


def tube_route(src: ShapeState, tgt: ShapeState, chosen: Candidate, found: dict, opts: MatchOptions,
               seed: int, search):
    """Match the straightened tubes when both surfaces are elongated and that fits better.

    Elongated means a spectral gap like a rod's (``λ2/λ1`` above `TUBE_MIN_EIGEN_RATIO`)
    and a geodesic length over sqrt(area) (:func:`tubularity`) above
    `TUBE_MIN_LENGTH` on either surface.  Both tubes are then straightened
    (:func:`straightened`) and the solver's own candidate `search` runs on them; its
    winner replaces `chosen` when its unsupervised energy is below
    `TUBE_ENERGY_RATIO` times `chosen`'s.  ``found["tube"]`` records the test.  Returns
    None (keep `chosen`), or ``((straight src, straight tgt, winner), (src, tgt, posed),
    found)`` with `posed` the winner's map as a pose and smooth deformation of the
    unbent surfaces (:func:`fitted_candidate`).
    """
    ratios = [s.values[2] / max(s.values[1], 1e-300) for s in (src, tgt)]
    found["tube"] = {"eigenvalue_ratio": float(max(ratios)), "taken": False}
    if max(ratios) < tuning.TUBE_MIN_EIGEN_RATIO:
        return None
    ends = tube_ends(src), tube_ends(tgt)
    length = max(tubularity(src, ends[0]), tubularity(tgt, ends[1]))
    found["tube"]["length"] = length
    if length < tuning.TUBE_MIN_LENGTH:
        return None
    flat = straightened(src, ends[0]), straightened(tgt, ends[1])
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        winner, found_flat = search(*flat, opts, seed)
    e_bent = energy(src, tgt, chosen)["total"]
    e_flat = energy(*flat, winner)["total"]
    found["tube"].update(energy_bent=e_bent, energy_straightened=e_flat)
    if not e_flat < tuning.TUBE_ENERGY_RATIO * e_bent:
        return None
    for w in caught:  # the straightened search's warnings are the result's now
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    found_flat["tube"] = {**found["tube"], "taken": True}
    winner = replace(winner, route=winner.route + "+tube")
    return (*flat, winner), (src, tgt, fitted_candidate(src, tgt, winner.t2s, winner.s2t, winner.route)), found_flat
