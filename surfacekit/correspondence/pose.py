"""The transforms `match` reports, in millimetres.

The solver works in unit-size frames (:func:`~.extrinsic.normalized_coordinates`):
``p = (v - centroid) * scale`` on each surface.  Here its chosen pose, affine map
and smooth deformation are taken back to millimetres, and the rigid pose used for
change analysis is fitted once, robustly, to the final map.
"""
from __future__ import annotations

import numpy as np
from scipy.spatial.transform import Rotation

from ..mesh.proximity import nearest_corner, outward_vertex_normals, ring_faces
from ..mesh.surface import Surface
from . import tuning
from .alignment import MAD_TO_SD, TUKEY_C, Transform, rigid_transform
from .candidates import Candidate
from .closest import closest_near
from .shapes import ShapeState


def similarity_mm(src: ShapeState, tgt: ShapeState, pose: Transform) -> Transform:
    """A pose between the unit-size frames as a source -> target similarity in mm.

    ``v_t = c_t + (s R (v - c_s) k_s + t) / k_t``: rotation R, scale ``s k_s / k_t``
    (not 1 even for a rigid pose: the frames differ in size by the shapes' sizes).
    """
    scale = pose.scale * src.scale / tgt.scale
    translation = tgt.centroid + pose.translation / tgt.scale - scale * pose.rotation @ src.centroid
    return Transform(pose.rotation, translation, float(scale))


def affine_mm(src: ShapeState, tgt: ShapeState, cand: Candidate) -> np.ndarray:
    """The candidate's pose followed by its affine map, source -> target in mm, (4, 4)."""
    linear = cand.affine @ cand.pose.rotation * (cand.pose.scale * src.scale / tgt.scale)
    m = np.eye(4)
    m[:3, :3] = linear
    m[:3, 3] = (tgt.centroid + (cand.affine @ cand.pose.translation + cand.shift) / tgt.scale
                - linear @ src.centroid)
    return m


def deformation_mm(src: ShapeState, tgt: ShapeState, cand: Candidate) -> np.ndarray:
    """The candidate's smooth deformation at every source vertex, in mm, (n_source, 3):
    the low-eigenfunction displacement extended from the samples by the eigenvectors,
    so that ``affine_mm(x_i) + deformation_i`` is the deformed source vertex i."""
    D = cand.displacement
    return (src.phi[:, :len(D)] @ D) / tgt.scale


def rigid_pose(source: Surface, target: Surface, source_to_target: np.ndarray,
               weights: np.ndarray, *, rounds: int = tuning.POSE_ROUNDS,
               tol_mm: float = tuning.POSE_TOLERANCE_MM, tol_rad: float = tuning.POSE_TOLERANCE_RAD,
               rings: int = tuning.POSE_SEARCH_RINGS,
               follow_rings: int = tuning.POSE_FOLLOW_RINGS) -> tuple[Transform, int]:
    """The rigid pose of a map, robust to a changing region: source -> target, mm.

    Start: a confidence-weighted Kabsch fit of the matched vertex pairs (Kabsch,
    Acta Cryst. A 1976), made robust by Tukey-biweight reweighting (see
    :func:`~.alignment.rigid_transform`).  A vertex-level map is off by up to an
    edge, and drifts tangentially near a changing region, which tilts that pose;
    so it is refined by robust point-to-plane ICP (Chen & Medioni, Image Vision
    Comput. 1992): each round finds, for every source vertex, the closest point
    on the target faces near its matched vertex (`rings` rings: the map bounds
    the search; later rounds search `follow_rings` rings around the target
    vertex nearest the last closest point), and :func:`plane_step` solves the
    small-angle linearised point-to-plane least squares (Low, UNC Tech. Rep.
    TR04-004, 2004) with Tukey weights on the offsets along the source normals
    (Beaton & Tukey, Technometrics 1974) times `weights`.  Directions the planes barely constrain
    (the turns of a near-sphere) keep the map's pose: the pose never slides
    along a symmetry.  Rounds stop when a step moves no source vertex by more
    than `tol_mm` and turns by less than `tol_rad`, when the pose is back within
    that of the pose two rounds before (the discrete closest points of a noisy
    surface can alternate between two sets), or after `rounds`.

    The fit runs target -> source, in the source's frame, as change analysis
    measures it; the inverse is returned, so ``pose.inverse()`` brings the target
    into the source frame.  weights (n_source,) in [0, 1], e.g. the map's source
    confidence (all zero: uniform, as in :func:`~.alignment.rigid_transform`).
    Returns ``(pose, rounds used)``; the pose's ``weights`` are the
    final robust weights per source vertex (max 1), ``rms`` the weighted RMS
    point-to-plane offset (mm) and ``n_iter`` the rounds used.
    """
    x = source.vertices
    weights = np.asarray(weights, dtype=np.float64)
    if not weights.sum() > 0:
        weights = np.ones(len(x))
    to_source = rigid_transform(target.vertices[source_to_target], x, weights=weights)
    near = ring_faces(target, rings)  # candidate faces per seed vertex, built once
    follow_near = near if follow_rings == rings else ring_faces(target, follow_rings)
    seeds, adjacency = source_to_target, target.connectivity.vertex_adjacency(self_loops=True)
    normals = outward_vertex_normals(source)
    w, rms, used = to_source.weights, to_source.rms, 0
    earlier = [to_source]  # the poses one and two rounds back
    for used in range(1, rounds + 1):
        foot, face = closest_near(to_source.inverse().apply(x), target.vertices, target.faces, near, seeds,
                                  adjacency)
        near, seeds = follow_near, nearest_corner(foot, target.vertices, target.faces, face)
        step, w, rms = plane_step(x, to_source.apply(foot), normals, weights, tol_mm)
        to_source = to_source.then(step)
        # settled, or alternating between two sets of closest points (back where it was)
        if any(_close(to_source, pose, x, tol_mm, tol_rad) for pose in earlier):
            break
        earlier = [to_source, earlier[0]]
    wmax = w.max()
    fitted = Transform(to_source.rotation, to_source.translation, 1.0,
                       w / wmax if wmax > 0 else w, float(rms), used)
    return fitted.inverse(), used


def _close(a: Transform, b: Transform, points: np.ndarray, tol_mm: float, tol_rad: float) -> bool:
    """Whether two poses move no point by more than tol_mm apart and differ by a turn below tol_rad."""
    cos = (np.trace(a.rotation @ b.rotation.T) - 1.0) / 2.0
    return (np.abs(a.apply(points) - b.apply(points)).max() < tol_mm
            and np.arccos(np.clip(cos, -1.0, 1.0)) < tol_rad)


def plane_step(points: np.ndarray, feet: np.ndarray, normals: np.ndarray, weights: np.ndarray,
               tol_mm: float, max_iter: int = tuning.POSE_REWEIGHTINGS) -> tuple[Transform, np.ndarray, float]:
    """The small rigid motion bringing `feet` onto the tangent planes of `points`, robustly.

    Minimises ``Σ w_i (n_i · (q_i + ω × (q_i - c) + t - x_i))²`` over the rotation
    vector ω and translation t: the point-to-plane objective linearised for a
    small angle (Low, UNC Tech. Rep. TR04-004, 2004), about the weighted centroid
    c, solved as 6 x 6 normal equations with ω scaled by the RMS radius.  The
    weights are `weights` times Tukey's biweight of the offsets, robust scale
    1.4826·MAD (Beaton & Tukey, Technometrics 1974), re-solved until the step
    changes by less than `tol_mm` (iteratively reweighted least squares; the
    offsets are linear in the step, so no new closest points are needed).
    Directions whose curvature is below POSE_WEAK_DIRECTION of the strongest get
    no update.  points, feet, normals (n, 3); weights (n,).  Returns the step
    (exact rotation by ω), the final weights and their weighted RMS offset (mm).
    """
    centre = weights @ points / weights.sum()
    radius = float(np.sqrt(weights @ np.sum((points - centre) ** 2, axis=1) / weights.sum())) or 1.0
    J = np.hstack([np.cross(feet - centre, normals) / radius, normals])
    r0 = np.einsum("ij,ij->i", feet - points, normals)
    floor = 1e-9 * radius
    delta = np.zeros(6)
    for _ in range(max_iter):
        r = r0 + J @ delta
        sigma = max(MAD_TO_SD * float(np.median(np.abs(r[weights > 0]))), floor)
        u = r / (TUKEY_C * sigma)
        w = weights * np.where(np.abs(u) < 1.0, (1.0 - u * u) ** 2, 0.0)
        if not w.sum() > 0:
            w = weights
        A = (J * w[:, None]).T @ J
        vals, vecs = np.linalg.eigh(A)
        keep = vals > tuning.POSE_WEAK_DIRECTION * vals[-1]
        new = vecs[:, keep] @ ((vecs[:, keep].T @ (-(J * w[:, None]).T @ r0)) / vals[keep])
        done = np.abs(new - delta).max() < 0.1 * tol_mm
        delta = new
        if done:
            break
    r = r0 + J @ delta
    turn = Rotation.from_rotvec(delta[:3] / radius).as_matrix()
    step = Transform(turn, centre - turn @ centre + delta[3:])
    return step, w, float(np.sqrt(w @ r**2 / w.sum())) if w.sum() > 0 else 0.0
