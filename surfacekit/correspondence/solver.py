"""`match`: dense correspondence by combining extrinsic and intrinsic candidates."""
from __future__ import annotations

import contextlib
import logging
import time
import warnings

import numpy as np
from scipy.spatial import cKDTree

from ..mesh.surface import Surface
from . import extrinsic as ex
from .ambiguity import (
    AMBIGUOUS_BELOW,
    RIVAL_WITHIN,
    ROOM_ABOVE,
    TURN_BELOW,
    AmbiguousMatchWarning,
    rotation_ambiguity,
)
from .fmap import curvature_patch_descriptors, estimate_fmap, landmark_descriptors
from .options import MatchOptions
from .result import Correspondence
from .sampling import farthest_points
from .shapes import _anchors, _check_inputs, _prepare, _Shape
from .zoomout import nearest_rows, nearest_rows_local, pointmaps_from_fmap, zoomout

log = logging.getLogger("surfacekit")


def _blas_single_thread():
    """Limit BLAS to one thread: the matrices here are small, and threads only add contention."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # optional; results are identical either way
        return contextlib.nullcontext()
    return threadpool_limits(1, user_api="blas")


def _coarse_poses(src: _Shape, tgt: _Shape, opts: MatchOptions, seed: int) -> list:
    """Rigid poses from every candidate rotation, each polished by a short ICP on few points."""
    rots = ex.candidate_rotations(src.points, src.weights, tgt.points, tgt.weights,
                                  opts.same_orientation)
    lm = src.landmarks
    if len(lm) >= 3:  # known pairs fix the pose: try it first
        R, _, _ = ex.kabsch(src.points[lm[:, 0]], tgt.points[lm[:, 1]])
        rots = np.concatenate([R[None], rots])
    few_s = np.concatenate([src.sp[farthest_points(src.sp, 300, seed=seed)], src.points[lm[:, 0]]])
    few_t = tgt.sp[farthest_points(tgt.sp, 300, seed=seed)]
    tree = cKDTree(few_t)
    anchors = None
    if len(lm):
        anchors = (np.arange(len(few_s) - len(lm), len(few_s)), tgt.points[lm[:, 1]], opts.landmark_weight)
    poses = [ex.icp(few_s, few_t, R, iterations=8, tgt_tree=tree, scaling=opts.scaling, anchors=anchors)
             for R in rots]
    scores = np.array([p[3] for p in poses])
    if len(lm):  # rank poses by closest-point misfit plus landmark misfit
        scores = scores + np.array([np.sqrt(np.mean(np.sum(
            (p[2] * src.points[lm[:, 0]] @ p[0].T + p[1] - tgt.points[lm[:, 1]]) ** 2, axis=1)))
            for p in poses])
    keep = ex.distinct_poses(poses, scores, opts.n_poses)
    return [poses[i] for i in keep]


def _stage(src: _Shape, tgt: _Shape, cand: dict, ks, opts: MatchOptions) -> dict:
    """Advance a candidate through ZoomOut steps `ks`, with its deformed coordinates as extra signals."""
    fixed = (tgt.lm_rows, src.lm_rows) if len(src.landmarks) else None
    C, t2s, s2t = zoomout(tgt.sphi, src.sphi, cand["t2s"], ks=ks, bijective=opts.bijective,
                          coords_t=tgt.sp, coords_s=cand["coords"], s2t=cand.get("s2t"),
                          coord_weight=opts.coordinate_weight, fixed=fixed)
    return {**cand, "C": C, "t2s": t2s, "s2t": s2t}


def _extrinsic_start(src: _Shape, tgt: _Shape, pose, opts: MatchOptions) -> dict:
    """Initial candidate from a rigid pose: ICP on the samples, then closest points."""
    R, t, s, _rms = ex.icp(src.sp, tgt.sp, pose[0], iterations=opts.icp_iterations,
                          scaling=opts.scaling, anchors=_anchors(src, tgt, opts))
    return _deformed_start(src, tgt, "extrinsic", R, t, s, opts)


def _deformed_start(src: _Shape, tgt: _Shape, route: str, R, t, s, opts: MatchOptions) -> dict:
    """Candidate start from a rigid pose: affine ICP, smooth non-rigid ICP, then closest points."""
    moved = s * src.sp @ R.T + t
    anchors = _anchors(src, tgt, opts)
    affine = ex.affine_icp(moved, tgt.sp, anchors=anchors) if opts.affine else (np.eye(3), np.zeros(3))
    moved = moved @ affine[0].T + affine[1]
    A = np.zeros((0, 3))
    if opts.deform_k > 0:
        A = ex.spectral_nonrigid_icp(moved, src.sphi, src.values, tgt.sp, sizes=_deform_sizes(opts),
                                     anchors=anchors,
                                     tgt_normals=tgt.surface.vertex_normals[tgt.samples])
    coords = moved + src.sphi[:, :len(A)] @ A
    t2s = nearest_rows(tgt.sp, coords)
    t2s[tgt.lm_rows] = src.lm_rows
    return {"route": route, "t2s": t2s, "coords": coords,
            "pose": (R, t, s), "affine": affine, "displacement": A,
            "pose_residual": _pose_residual(src, tgt, R, t, s)}


def _deform_sizes(opts: MatchOptions) -> list:
    """Coarse-to-fine eigenfunction counts of the smooth non-rigid ICP, ending at `opts.deform_k`."""
    return [k for k in (3, 6, 10, 16, 24, 32, 48) if k < opts.deform_k] + [opts.deform_k]


def _pose_residual(src: _Shape, tgt: _Shape, R, t, s) -> float:
    """Robust misfit of a rigid pose: mean point-to-plane distance of all source vertices to
    the target, each capped at the 90th percentile (so local growth does not dominate)."""
    d = tgt.plane_distances(s * src.points @ R.T + t)
    return float(np.mean(np.minimum(d, np.percentile(d, 90))))


def _intrinsic_start(src: _Shape, tgt: _Shape, opts: MatchOptions) -> dict:
    """Initial candidate from descriptors alone; its pose is then fitted to the map (Kabsch)."""
    k = min(opts.intrinsic_k, src.phi.shape[1], tgt.phi.shape[1])
    desc_s, desc_t = src.desc, tgt.desc
    if opts.patch_descriptors:  # local geometry around each vertex, not only spectral signatures
        desc_s = np.hstack([desc_s, curvature_patch_descriptors(src.spectral)])
        desc_t = np.hstack([desc_t, curvature_patch_descriptors(tgt.spectral)])
    if len(src.landmarks):  # landmark pairs enter the functional map as heat-kernel descriptors
        desc_s = np.hstack([landmark_descriptors(src.spectral, src.lm_vertices), desc_s])
        desc_t = np.hstack([landmark_descriptors(tgt.spectral, tgt.lm_vertices), desc_t])
    C = estimate_fmap(src.spectral, tgt.spectral, desc_s, desc_t, k)
    t2s, _ = pointmaps_from_fmap(C, tgt.sphi[:, :k], src.sphi[:, :k], both=False)
    t2s[tgt.lm_rows] = src.lm_rows
    R, _, _ = ex.kabsch(src.sp[t2s], tgt.sp)
    R, t, s, _ = ex.icp(src.sp, tgt.sp, R, iterations=opts.icp_iterations, scaling=opts.scaling,
                        anchors=_anchors(src, tgt, opts))
    return _deformed_start(src, tgt, "intrinsic", R, t, s, opts)


def _energy(src: _Shape, tgt: _Shape, cand: dict) -> dict:
    """Unsupervised energy of a candidate on the samples (lower is better); no ground truth used.

    Terms: robust residual of the candidate's rigid pose (unit-size units; what
    tells a near-symmetric shape from its rotated copy), round-trip (bijectivity)
    distance on both shapes, and descriptor disagreement relative to a random map.
    """
    t2s, s2t = cand["t2s"], cand["s2t"]
    desc = float(np.mean(np.linalg.norm(tgt.sdesc - src.sdesc[t2s], axis=1))
                 / np.mean(np.linalg.norm(tgt.sdesc - src.sdesc[np.roll(t2s, len(t2s) // 2)], axis=1)))
    rt_t = float(np.mean(np.linalg.norm(tgt.sp[s2t[t2s]] - tgt.sp, axis=1)))
    rt_s = float(np.mean(np.linalg.norm(src.sp[t2s[s2t]] - src.sp, axis=1)))
    cover = 1.0 - 0.5 * (len(np.unique(t2s)) / len(s2t) + len(np.unique(s2t)) / len(t2s))
    rigid = cand["pose_residual"]
    total = rigid + 0.1 * (rt_t + rt_s) + 0.01 * desc
    if len(src.landmarks):  # how far the candidate's pose and deformation put each landmark from its partner
        total += float(np.mean(np.linalg.norm(cand["coords"][src.lm_rows] - tgt.sp[tgt.lm_rows], axis=1)))
    return {"total": total, "rigid_residual": rigid, "descriptor": desc,
            "round_trip": 0.5 * (rt_t + rt_s), "coverage_gap": cover}


def _extend(src: _Shape, tgt: _Shape, cand: dict, opts: MatchOptions):
    """Full-resolution point maps from the candidate's functional map and deformed coordinates."""
    C = cand["C"]
    k = C.shape[0]
    w = opts.coordinate_weight
    R, t, s = cand["pose"]
    A = cand["displacement"]
    Aff, b = cand["affine"]
    moved = (s * src.points @ R.T + t) @ Aff.T + b + src.phi[:, :len(A)] @ A
    emb_t = np.hstack([tgt.phi[:, :k] @ C, w * tgt.points])
    emb_s = np.hstack([src.phi[:, :k], w * moved])
    if w * np.std(tgt.points) < np.sqrt(k):  # coordinates too light to restrict the search
        t2s, s2t = nearest_rows(emb_t, emb_s), nearest_rows(emb_s, emb_t)
    else:
        t2s = nearest_rows_local(emb_t, emb_s, tgt.points, moved)
        s2t = nearest_rows_local(emb_s, emb_t, moved, tgt.points)
    t2s[tgt.lm_vertices] = src.lm_vertices
    s2t[src.lm_vertices] = tgt.lm_vertices
    return t2s, s2t


def _probe(src: _Shape, tgt: _Shape, cand: dict) -> dict:
    R, t, s = cand["pose"]
    return rotation_ambiguity(s * src.sp @ R.T + t, tgt.sp, tgt.tree, tgt.points,
                              tgt.surface.vertex_normals, tgt.weights)


def _rival(candidates: list, energies: list, best: int) -> dict | None:
    """The best other finalist whose pose differs from the winner's by more than 25 degrees:
    its energy relative to the winner's, and the angle between the poses."""
    out = None
    for i, (c, e) in enumerate(zip(candidates, energies)):
        angle = float(np.degrees(ex.rotation_angle(c["pose"][0] @ candidates[best]["pose"][0].T)))
        ratio = e / max(energies[best], 1e-300)
        if i != best and angle > 25.0 and (out is None or ratio < out["energy_ratio"]):
            out = {"energy_ratio": float(ratio), "angle_deg": angle}
    return out


def _floor(src: _Shape, tgt: _Shape, cand: dict, opts: MatchOptions) -> float:
    """Mean point-to-plane misfit reached by a smooth point-to-point non-rigid ICP from the
    candidate's affine pose: the scale of misfit that the deformation model leaves.

    (Point-to-point on purpose: its pull towards sample positions keeps this floor
    at the sampling's own misfit, which is what the turn gate compares against; the
    thresholds were measured with it.)
    """
    R, t, s = cand["pose"]
    Aff, b = cand["affine"]
    moved = (s * src.sp @ R.T + t) @ Aff.T + b
    if opts.deform_k > 0:
        D = ex.spectral_nonrigid_icp(moved, src.sphi, src.values, tgt.sp, sizes=_deform_sizes(opts))
        moved = moved + src.sphi[:, :len(D)] @ D
    return float(np.mean(tgt.plane_distances(moved)))


def _settle(src: _Shape, tgt: _Shape, cand: dict, opts: MatchOptions, ks_coarse, ks_fine,
            rival: dict | None = None):
    """Turn the chosen candidate while a turned pose fits clearly better, then judge ambiguity.

    The rotation probe (:func:`rotation_ambiguity`) turns the pose by ±30 degrees
    about each principal axis and refits an affine map.  If a turn lowers the
    misfit below `TURN_BELOW` times the current one, while the current affine
    misfit is more than `ROOM_ABOVE` times what the smooth non-rigid deformation
    reaches (so there is room to improve; on an exact remesh the affine fit is
    already at that floor and a turn only trades noise), the pose search had
    stopped in a local minimum: the candidate is rebuilt from the turned pose and
    probed again (at most `opts.max_turns` times).  If the final pose's best turn is
    within `AMBIGUOUS_BELOW` of its misfit, the shapes do not fix that rotation;
    likewise if the `rival` finalist, turned by more than 25 degrees from the
    winner of the candidate energy (typically a 180-degree flip), has an energy
    within `RIVAL_WITHIN` of the winner's.
    Either way an :class:`AmbiguousMatchWarning` is issued.  Skipped (None) with
    two or more landmark pairs, which fix any rotation.  Returns
    ``(candidate, probe)``.
    """
    if len(src.landmarks) >= 2 or not opts.check_ambiguity:
        return cand, None
    probe = _probe(src, tgt, cand)
    turns = 0
    while probe["ratio"] < TURN_BELOW and turns < opts.max_turns and probe["misfit"] > ROOM_ABOVE * _floor(src, tgt, cand, opts):
        R, t, s = cand["pose"]
        turn, c = probe["turn"], probe["centre"]
        cand = _deformed_start(src, tgt, cand["route"] + "+turn", turn @ R, turn @ (t - c) + c, s, opts)
        cand = _stage(src, tgt, _stage(src, tgt, cand, ks_coarse, opts), ks_fine, opts)
        probe = _probe(src, tgt, cand)
        turns += 1
    out = {k: v for k, v in probe.items() if k not in ("turn", "centre")}
    out["turns"] = turns
    out["rival"] = rival
    flip = out["rival"] is not None and out["rival"]["energy_ratio"] < RIVAL_WITHIN
    out["flip"] = bool(flip)  # a flipped finalist ties with the winner
    out["ambiguous"] = bool(probe["ratio"] < AMBIGUOUS_BELOW or flip)
    if flip:
        warnings.warn(
            f"an alternative map turned by {out['rival']['angle_deg']:.0f} degrees fits almost as well "
            f"(energy ratio {out['rival']['energy_ratio']:.3f}, below {RIVAL_WITHIN}): the map may be "
            "flipped; give two or three landmark pairs (MatchOptions.landmarks, or --landmarks on the "
            "command line) to fix it", AmbiguousMatchWarning, stacklevel=3)
    elif out["ambiguous"]:
        names = ("longest", "middle", "shortest")
        warnings.warn(
            f"the shapes hardly constrain a {abs(probe['angle_deg']):.0f}-degree turn about the target's "
            f"{names[probe['axis']]} principal axis (misfit ratio {probe['ratio']:.2f}, below "
            f"{AMBIGUOUS_BELOW}): the map may be turned about that axis; give two or three "
            "landmark pairs (MatchOptions.landmarks, or --landmarks on the command line) to fix it",
            AmbiguousMatchWarning, stacklevel=3)
    return cand, out


def _confidence(points: np.ndarray, roundtrip: np.ndarray, width: float = 0.05) -> np.ndarray:
    """exp(-(d/width)²) of the round-trip distance d (unit-size units) per vertex, in [0, 1]."""
    d = np.linalg.norm(points[roundtrip] - points, axis=1)
    return np.exp(-((d / width) ** 2))


def match(source: Surface, target: Surface, options: MatchOptions | None = None, *,
          seed: int = 0) -> Correspondence:
    """Dense vertex-to-vertex correspondence between two surfaces of the same organ.

    Candidates come from both routes: extrinsic (rigid poses from every proper
    pairing of the principal axes and the identity, polished by ICP, Besl & McKay
    1992) and intrinsic (a functional map from WKS/HKS descriptors, Ovsjanikov et
    al., SIGGRAPH 2012, with descriptor-commutativity operators, Nogneng &
    Ovsjanikov, Eurographics 2017, and an orientation term, Ren et al., SIGGRAPH
    Asia 2018, whose pose is then fitted to its point map).  Each candidate's
    source is deformed smoothly onto the target (ICP with a displacement in the low
    Laplace–Beltrami eigenfunctions), then refined by ZoomOut (Melzi et al.,
    SIGGRAPH Asia 2019) on well-spread vertex samples, with the deformed
    coordinates appended to the spectral embeddings.  The candidate with the
    lowest unsupervised energy (robust pose residual, round-trip error,
    descriptor disagreement, landmark distance) wins.  A probe then turns its
    pose by ±30 degrees about each principal axis and refits an affine map: a
    turn that fits clearly better is adopted and refined again (the pose search
    had stopped in a local minimum, as anisotropic growth can cause); if the
    shapes barely resist a turn (a near-round cross section, say), or a flipped
    finalist's energy ties with the winner's, an :class:`AmbiguousMatchWarning`
    says so and ``info["rotation_ambiguity"]`` records it; landmark pairs fix
    such a map.  The result is extended to all vertices.

    Parameters
    ----------
    source, target : Surface
        Closed or open connected surfaces (mm); they may differ in pose,
        triangulation, resolution and size.
    options : MatchOptions, optional
    seed : int
        Makes the vertex sampling, and so the result, deterministic.

    Returns
    -------
    Correspondence
        ``source_to_target`` (n_source,), ``target_to_source`` (n_target,), the
        functional map (k, k), confidence in [0, 1] per vertex, ``info`` with the
        route chosen, candidate energies, the rotation probe and timings (s).
    """
    opts = _check_inputs(source, target, options)
    t0 = time.perf_counter()
    timings = {}
    with _blas_single_thread():
        src, tgt = _prepare(source, opts, seed, 0), _prepare(target, opts, seed + 1, 1)
        timings["prepare"] = time.perf_counter() - t0
        starts = [_extrinsic_start(src, tgt, pose, opts) for pose in _coarse_poses(src, tgt, opts, seed)]
        if opts.intrinsic_candidate:
            starts.append(_intrinsic_start(src, tgt, opts))
        k_mid = min(opts.zoomout_mid, opts.n_eigen)
        ks_coarse = range(opts.zoomout_start, k_mid + 1, opts.zoomout_step)
        coarse = [_stage(src, tgt, c, ks_coarse, opts) for c in starts]
        coarse_e = [_energy(src, tgt, c)["total"] for c in coarse]
        timings["coarse"] = time.perf_counter() - t0 - timings["prepare"]
        keep = np.argsort(coarse_e)[: opts.n_finalists]
        ks = list(range(k_mid + opts.zoomout_step, opts.n_eigen + 1, opts.zoomout_step)) or [k_mid]
        if ks[-1] != opts.n_eigen and opts.n_eigen > k_mid:
            ks.append(opts.n_eigen)
        candidates = [_stage(src, tgt, coarse[i], ks, opts) for i in keep]
        energies = [_energy(src, tgt, c) for c in candidates]
        best = int(np.argmin([e["total"] for e in energies]))
        timings["fine"] = time.perf_counter() - t0 - timings["prepare"] - timings["coarse"]
        chosen, ambiguity = _settle(src, tgt, candidates[best], opts, ks_coarse, ks,
                                    _rival(candidates, [e["total"] for e in energies], best))
        timings["turn_probe"] = (time.perf_counter() - t0 - timings["prepare"] - timings["coarse"]
                                 - timings["fine"])
        t2s, s2t = _extend(src, tgt, chosen, opts)
        # the reported functional map: from the final full-resolution map, M-weighted
        # (C = Φ_tᵀ M_t Π Φ_s, Ovsjanikov et al. 2012), in the unit-area bases
        C = tgt.phi.T @ (tgt.spectral.mass[:, None] * src.phi[t2s])
    timings["total"] = time.perf_counter() - t0
    info = {
        "route": chosen["route"],
        "coarse_energies": [float(e) for e in coarse_e],
        "candidates": [{"route": c["route"], **e} for c, e in zip(candidates, energies)],
        "chosen": best,
        "rotation_ambiguity": ambiguity,
        "timings_s": timings,
        "options": opts.to_dict(),
        "seed": int(seed),
    }
    return Correspondence(
        source_to_target=s2t, target_to_source=t2s, functional_map=C,
        confidence=_confidence(tgt.points, s2t[t2s]),
        source_confidence=_confidence(src.points, t2s[s2t]), info=info)
