"""Candidate maps of the solver: where they start (poses, descriptors), how they are refined
and scored.  All coordinates here are in the unit-size frames of the two shapes."""
from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy.spatial import cKDTree

from ..mesh.sampling import farthest_points
from . import extrinsic as ex
from . import tuning
from .alignment import Transform, kabsch
from .fmap import curvature_patch_descriptors, estimate_fmap, landmark_descriptors
from .options import MatchOptions
from .shapes import ShapeState, landmark_anchors
from .zoomout import nearest_rows, pointmaps_from_fmap, zoomout


@dataclass(frozen=True)
class Candidate:
    """One candidate map between the sampled vertices, with the deformation that produced it.

    The source samples are placed on the target by `pose` (rigid, or a similarity
    with ``MatchOptions.scaling``), then the affine map ``x @ affine.T + shift``,
    then the smooth displacement ``phi[:, :k] @ displacement`` in the source's
    first k unit-area eigenfunctions; `coords` are the samples so placed.
    """

    route: str                  # "extrinsic", "intrinsic", with "+turn" per adopted turn
    pose: Transform             # normalised source frame -> normalised target frame
    affine: np.ndarray          # (3, 3)
    shift: np.ndarray           # (3,)
    displacement: np.ndarray    # (k, 3) coefficients of the smooth deformation
    coords: np.ndarray          # (p, 3) deformed source samples
    t2s: np.ndarray             # (q,) target sample -> source sample row
    pose_residual: float        # robust misfit of `pose` alone (see pose_residual)
    s2t: np.ndarray | None = None   # (p,) source sample -> target sample row, after refinement
    fmap: np.ndarray | None = None  # (k, k) functional map of the last refinement step

    def affine_points(self, points: np.ndarray) -> np.ndarray:
        """Source points (normalised, (n, 3)) after the pose and the affine map."""
        return self.pose.apply(points) @ self.affine.T + self.shift

    def deformed_points(self, points: np.ndarray, phi: np.ndarray) -> np.ndarray:
        """Source points after pose, affine map and smooth deformation; phi (n, K) the source's
        unit-area eigenvectors at the same points."""
        return self.affine_points(points) + phi[:, :len(self.displacement)] @ self.displacement


def deform_sizes(opts: MatchOptions) -> list:
    """Coarse-to-fine eigenfunction counts of the smooth non-rigid ICP, ending at `opts.deform_k`."""
    return [k for k in tuning.DEFORM_SIZES if k < opts.deform_k] + [opts.deform_k]


def pose_residual(src: ShapeState, tgt: ShapeState, pose: Transform) -> float:
    """Robust misfit of a rigid pose: mean point-to-plane distance of all source vertices to
    the target, each capped at a high percentile (so local growth does not dominate)."""
    d = tgt.plane_distances(pose.apply(src.points))
    return float(np.mean(np.minimum(d, np.percentile(d, tuning.POSE_RESIDUAL_PERCENTILE))))


def coarse_poses(src: ShapeState, tgt: ShapeState, opts: MatchOptions, seed: int) -> list[Transform]:
    """Rigid poses from every candidate rotation, each polished by a short ICP on few points;
    the best `opts.n_poses` distinct ones."""
    rots = ex.candidate_rotations(src.points, src.weights, tgt.points, tgt.weights,
                                  opts.same_orientation)
    lm = src.landmarks
    if len(lm) >= 3:  # known pairs fix the pose: try it first
        R, _, _ = kabsch(src.points[lm[:, 0]], tgt.points[lm[:, 1]])
        rots = np.concatenate([R[None], rots])
    n = tuning.COARSE_POSE_SAMPLES
    few_s = np.concatenate([src.sp[farthest_points(src.sp, n, seed=seed)], src.points[lm[:, 0]]])
    few_t = tgt.sp[farthest_points(tgt.sp, n, seed=seed)]
    tree = cKDTree(few_t)
    anchors = None
    if len(lm):
        anchors = (np.arange(len(few_s) - len(lm), len(few_s)), tgt.points[lm[:, 1]], opts.landmark_weight)
    fits = [ex.icp(few_s, few_t, R, iterations=tuning.COARSE_ICP_ITERATIONS, tgt_tree=tree,
                   scaling=opts.scaling, anchors=anchors) for R in rots]
    poses = [pose for pose, _ in fits]
    scores = np.array([rms for _, rms in fits])
    if len(lm):  # rank poses by closest-point misfit plus landmark misfit
        scores = scores + np.array([np.sqrt(np.mean(np.sum(
            (p.apply(src.points[lm[:, 0]]) - tgt.points[lm[:, 1]]) ** 2, axis=1))) for p in poses])
    keep = ex.distinct_poses(poses, scores, opts.n_poses)
    return [poses[i] for i in keep]


def extrinsic_start(src: ShapeState, tgt: ShapeState, pose: Transform, opts: MatchOptions) -> Candidate:
    """Initial candidate from a coarse pose's rotation: ICP on the samples, then the deformation."""
    pose, _rms = ex.icp(src.sp, tgt.sp, pose.rotation, iterations=opts.icp_iterations,
                        scaling=opts.scaling, anchors=landmark_anchors(src, tgt, opts))
    return deformed_start(src, tgt, "extrinsic", pose, opts)


def intrinsic_start(src: ShapeState, tgt: ShapeState, opts: MatchOptions) -> Candidate:
    """Initial candidate from descriptors alone; its pose is then fitted to the map (Kabsch)."""
    k = min(opts.intrinsic_k, src.phi.shape[1], tgt.phi.shape[1])
    desc_s, desc_t = src.desc, tgt.desc
    if opts.patch_descriptors:  # local geometry around each vertex, not only spectral signatures
        desc_s = np.hstack([desc_s, curvature_patch_descriptors(src)])
        desc_t = np.hstack([desc_t, curvature_patch_descriptors(tgt)])
    if len(src.landmarks):  # landmark pairs enter the functional map as heat-kernel descriptors
        desc_s = np.hstack([landmark_descriptors(src, src.lm_vertices), desc_s])
        desc_t = np.hstack([landmark_descriptors(tgt, tgt.lm_vertices), desc_t])
    C = estimate_fmap(src, tgt, desc_s, desc_t, k)
    t2s, _ = pointmaps_from_fmap(C, tgt.sphi[:, :k], src.sphi[:, :k], both=False)
    t2s[tgt.lm_rows] = src.lm_rows
    R, _, _ = kabsch(src.sp[t2s], tgt.sp)
    pose, _rms = ex.icp(src.sp, tgt.sp, R, iterations=opts.icp_iterations, scaling=opts.scaling,
                        anchors=landmark_anchors(src, tgt, opts))
    return deformed_start(src, tgt, "intrinsic", pose, opts)


def deformed_start(src: ShapeState, tgt: ShapeState, route: str, pose: Transform,
                   opts: MatchOptions) -> Candidate:
    """Candidate start from a rigid pose: affine ICP, smooth non-rigid ICP, then closest points."""
    moved = pose.apply(src.sp)
    anchors = landmark_anchors(src, tgt, opts)
    affine, shift = ex.affine_icp(moved, tgt.sp, anchors=anchors) if opts.affine else (np.eye(3), np.zeros(3))
    moved = moved @ affine.T + shift
    A = np.zeros((0, 3))
    if opts.deform_k > 0:
        A = ex.spectral_nonrigid_icp(moved, src.sphi, src.values, tgt.sp, sizes=deform_sizes(opts),
                                     anchors=anchors,
                                     tgt_normals=tgt.surface.vertex_normals[tgt.samples])
    coords = moved + src.sphi[:, :len(A)] @ A
    t2s = nearest_rows(tgt.sp, coords)
    t2s[tgt.lm_rows] = src.lm_rows
    return Candidate(route, pose, affine, shift, A, coords, t2s, pose_residual(src, tgt, pose))


def refine(src: ShapeState, tgt: ShapeState, cand: Candidate, ks, opts: MatchOptions) -> Candidate:
    """Advance a candidate through ZoomOut steps `ks`, with its deformed coordinates as extra signals."""
    fixed = (tgt.lm_rows, src.lm_rows) if len(src.landmarks) else None
    C, t2s, s2t = zoomout(tgt.sphi, src.sphi, cand.t2s, ks=ks, bijective=opts.bijective,
                          coords_t=tgt.sp, coords_s=cand.coords, s2t=cand.s2t,
                          coord_weight=opts.coordinate_weight, fixed=fixed)
    return replace(cand, fmap=C, t2s=t2s, s2t=s2t)


def energy(src: ShapeState, tgt: ShapeState, cand: Candidate) -> dict[str, float]:
    """Unsupervised energy of a refined candidate on the samples (lower is better); no ground truth used.

    Terms: robust residual of the candidate's rigid pose (unit-size units; what
    tells a near-symmetric shape from its rotated copy), round-trip (bijectivity)
    distance on both shapes, and descriptor disagreement relative to a random map;
    weights in :mod:`.tuning`.
    """
    t2s, s2t = cand.t2s, cand.s2t
    desc = float(np.mean(np.linalg.norm(tgt.sdesc - src.sdesc[t2s], axis=1))
                 / np.mean(np.linalg.norm(tgt.sdesc - src.sdesc[np.roll(t2s, len(t2s) // 2)], axis=1)))
    rt_t = float(np.mean(np.linalg.norm(tgt.sp[s2t[t2s]] - tgt.sp, axis=1)))
    rt_s = float(np.mean(np.linalg.norm(src.sp[t2s[s2t]] - src.sp, axis=1)))
    cover = 1.0 - 0.5 * (len(np.unique(t2s)) / len(s2t) + len(np.unique(s2t)) / len(t2s))
    rigid = cand.pose_residual
    total = rigid + tuning.ENERGY_ROUND_TRIP * (rt_t + rt_s) + tuning.ENERGY_DESCRIPTOR * desc
    if len(src.landmarks):  # how far the candidate's pose and deformation put each landmark from its partner
        total += float(np.mean(np.linalg.norm(cand.coords[src.lm_rows] - tgt.sp[tgt.lm_rows], axis=1)))
    return {"total": total, "rigid_residual": rigid, "descriptor": desc,
            "round_trip": 0.5 * (rt_t + rt_s), "coverage_gap": cover}
