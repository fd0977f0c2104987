"""The transforms `match` reports, in millimetres.

The solver works in unit-size frames (:func:`~.extrinsic.normalized_coordinates`):
``p = (v - centroid) * scale`` on each surface.  Here its chosen pose, affine map
and smooth deformation are taken back to millimetres, and the rigid pose used for
change analysis is fitted once, robustly, to the final map.
"""
from __future__ import annotations

import numpy as np

from ..mesh.proximity import near_faces, outward_vertex_normals, project_pairs
from ..mesh.surface import Surface
from . import tuning
from .alignment import Transform, rigid_transform
from .candidates import Candidate
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
               weights: np.ndarray, *, rounds: int = tuning.POSE_REFINE_ROUNDS,
               tol_mm: float = tuning.POSE_REFINE_TOLERANCE_MM,
               rings: int = tuning.POSE_REFINE_RINGS) -> tuple[Transform, int]:
    """The rigid pose of a map, robust to a changing region: source -> target, mm.

    First a confidence-weighted Kabsch fit of the matched vertex pairs (Kabsch,
    Acta Cryst. A 1976), made robust by Tukey-biweight reweighting (see
    :func:`~.alignment.rigid_transform`), so a growing region gets weight ~0.
    A vertex-level map is off by up to an edge (and by smooth tangential drift
    near changing regions), which tilts such a pose; so it is refined by
    point-to-surface rounds along the source normals.  Each round finds, for
    every source vertex, its closest point on the target faces near its matched
    vertex (`rings` rings), keeps only the offset along the source normal (a
    point-to-plane step in the spirit of Chen & Medioni, Image Vision Comput.
    1992, with the search limited by the map), and refits the robust pose.
    Tangential offsets are not used: on near-symmetric shapes (a growing sphere)
    closest points would let the pose slide; the tangential pose comes from the map.

    The fit runs target -> source, in the source's frame, as change analysis
    measures it; the inverse is returned, so ``pose.inverse()`` brings the target
    into the source frame.  weights (n_source,) in [0, 1], e.g. the map's source
    confidence.  Returns ``(pose, rounds used)``; the pose's ``weights`` are the
    final robust weights per source vertex and ``rms`` the residual (mm) of the
    last round.
    """
    to_source = rigid_transform(target.vertices[source_to_target], source.vertices, weights=weights)
    pairs = near_faces(target, source_to_target, rings)
    normals = outward_vertex_normals(source)
    moved = to_source.apply(target.vertices)
    used = 0
    for used in range(1, rounds + 1):
        foot = project_pairs(source.vertices, moved, target.faces, pairs)
        h = np.einsum("ij,ij->i", foot - source.vertices, normals)
        goal = source.vertices + h[:, None] * normals
        step = rigid_transform(goal, source.vertices, weights=weights)
        to_source = to_source.then(step)
        moved = to_source.apply(target.vertices)
        if np.abs(step.apply(source.vertices) - source.vertices).max() < tol_mm:
            break
    return to_source.inverse(), used
