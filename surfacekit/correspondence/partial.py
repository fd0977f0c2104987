"""Partial-to-whole correspondence: one surface covers only part of the other.

A follow-up scan often holds only part of an organ: the field of view or a slab
protocol cut it, or a segmentation stops at the image border.  Such a surface is
open along a cut that is a near-planar cross-section, while the other scan is
closed.  :func:`detect_partial` recognises that situation (or takes the user's
word for it), and :func:`match_partial` maps the part into the whole:

1. the part is placed on the whole by a trimmed ICP (Chetverikov, Svirko,
   Stepanov & Krsek, "The trimmed iterative closest point algorithm", ICPR 2002)
   run from many starting poses at once, with closest points taken from the part
   only, so the whole's missing region pulls nothing;
2. an affine map, then a smooth displacement in the part's low Laplace–Beltrami
   eigenfunctions (spectral non-rigid ICP, as in :mod:`.extrinsic`), fitted to the
   part's closest points and to the whole's points in the covered region only;
3. every vertex of the part gets its nearest whole vertex, the whole gets a mask
   of the region the part covers (a vertex is beyond the cut when its nearest
   part vertex lies on the cut and it lies outward of the cut there), and the
   functional map of the result shows the slanted-diagonal structure of partial
   functional maps (Rodolà, Cosmo, Bronstein, Torsello & Cremers, "Partial
   functional correspondence", Computer Graphics Forum 2017; :mod:`.partial_fmap`).
"""
from __future__ import annotations

import warnings

import numpy as np
from scipy.spatial import cKDTree
from scipy.spatial.transform import Rotation

from ..mesh.eigen import eigenbasis
from ..mesh.proximity import closest_on_faces, near_faces
from ..mesh.sampling import farthest_points
from ..mesh.surface import Surface
from . import extrinsic as ex
from . import tuning
from .alignment import kabsch
from .ambiguity import AmbiguousMatchWarning
from .partial_fmap import overlap_fmap, slanted_slope, soft_indicator

#: a boundary loop is a cut when its RMS distance from its best-fitting plane is below this
#: share of its RMS radius (a plane cut through a triangulation: 0.01-0.05 on the benchmark
#: crops; a ragged hole in a bad mesh is far from planar)
PLANAR_LOOP = 0.15
#: ... and its RMS radius is at least this share of the surface's RMS radius (a small hole is
#: a defect to fill, not a crop)
LOOP_SIZE = 0.15
#: share of the part's closest-point pairs kept in each trimmed ICP step (the rest, the worst,
#: are dropped: growth or a slightly wrong crop should not pull the pose)
TRIM_KEEP = 0.9
#: fixed pseudo-random rotations tried besides the principal-axis pairings (a part's principal
#: axes need not agree with the whole's)
N_RANDOM_ROTATIONS = 48
#: starting poses kept after the coarse batched ICP, refined on more points
N_REFINED = 6
#: a start in the scanners' shared frame wins when its misfit is within this factor of the best
#: (a symmetric part fits everywhere alike; then nothing tells the frames apart)
SAME_FRAME_WITHIN = 1.05
#: a refined pose turned by more than this (degrees) from the chosen one counts as a rival
#: (nearby poses are the same basin reached twice)
RIVAL_ANGLE_DEG = 60.0
#: a rival whose misfit is within this factor of the chosen pose's makes the map ambiguous:
#: measured 1.03 for a flipped cropped ventricle, 1.13-1.9 for correctly placed kidney and
#: liver crops (the whole-to-whole solver's RIVAL_WITHIN is 1.05)
RIVAL_WITHIN = 1.05
#: eigenfunctions of the part in the smooth deformation, coarse to fine
DEFORM_SIZES = (3, 6, 10)
MODES = ("auto", "yes", "no")


def loop_shape(s: Surface, loop: np.ndarray) -> tuple[float, float]:
    """(RMS distance from the best plane / RMS radius, RMS radius in mm) of a boundary loop."""
    q = s.vertices[loop] - s.vertices[loop].mean(axis=0)
    sv = np.linalg.svd(q, compute_uv=False) / np.sqrt(len(loop))
    radius = float(np.hypot(sv[0], sv[1]))
    return float(sv[2] / max(radius, 1e-300)), radius


def _rms_radius(s: Surface) -> float:
    w = s.vertex_areas / s.area
    return float(np.sqrt(w @ np.sum((s.vertices - s.centroid) ** 2, axis=1)))


def cut_loops(s: Surface) -> list[dict]:
    """Each boundary loop of `s`: vertex count, planarity, radius (mm), and whether it looks like a cut."""
    size = _rms_radius(s)
    out = []
    for loop in s.boundary_loops:
        flat, radius = loop_shape(s, loop) if len(loop) >= 3 else (1.0, 0.0)
        out.append({"vertices": len(loop), "planarity": flat, "radius_mm": radius,
                    "cut": bool(flat < PLANAR_LOOP and radius >= LOOP_SIZE * size)})
    return out


def detect_partial(source: Surface, target: Surface, mode: str = "auto") -> dict | None:
    """Whether one surface covers only part of the other, and which.

    ``mode="no"``: never.  ``"auto"``: exactly one surface is open, and at least one
    of its boundary loops is a cut (near-planar and not small, see :func:`cut_loops`).
    ``"yes"``: always; the open surface is the part (the smaller one when both or
    neither are open).  Closed pairs are never partial in ``"auto"`` (checked first,
    so whole-to-whole matching is untouched).  Returns None or ``{"side": "source" |
    "target", "area_ratio": part / whole area, "loops": [...], "forced": bool}``.
    """
    if mode not in MODES:
        raise ValueError(f"partial must be one of {MODES}, got {mode!r}")
    if mode == "no" or (mode == "auto" and source.is_closed == target.is_closed):
        return None
    if source.is_closed != target.is_closed:
        side = 1 if source.is_closed else 0
    else:
        side = 0 if source.area <= target.area else 1
    part, whole = (source, target) if side == 0 else (target, source)
    loops = cut_loops(part)
    if mode == "auto" and not any(lp["cut"] for lp in loops):
        return None
    return {"side": ("source", "target")[side], "area_ratio": float(part.area / whole.area),
            "loops": loops, "forced": mode == "yes"}


# ------------------------------------------------------------------ rigid placement
def _kabsch_batch(P: np.ndarray, Y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted Kabsch fits of P (p, 3) onto Y (m, p, 3) with weights w (m, p): R (m,3,3), t (m,3)."""
    ws = np.maximum(w.sum(axis=1), 1e-300)[:, None]
    cp = w @ P / ws
    cy = np.einsum("mp,mpi->mi", w, Y) / ws
    H = np.einsum("mp,mpi,mpj->mij", w, P[None] - cp[:, None], Y - cy[:, None])
    U, _, Vt = np.linalg.svd(H)
    d = np.sign(np.linalg.det(np.einsum("mji,mkj->mik", Vt, U)))
    D = np.ones((len(w), 3))
    D[:, 2] = np.where(d == 0, 1.0, d)
    R = np.einsum("mji,mj,mkj->mik", Vt, D, U)
    return R, cy - np.einsum("mij,mj->mi", R, cp)


def trimmed_icp(P: np.ndarray, tree: cKDTree, W: np.ndarray, R: np.ndarray, t: np.ndarray,
                iterations: int, keep: float = TRIM_KEEP):
    """Trimmed ICP of the part's points P (p, 3) into the whole, from m starts at once.

    Each step pairs every part point with its closest whole point, keeps the best
    `keep` share of the pairs of each start and refits the rigid pose by Kabsch
    (Chetverikov et al., ICPR 2002).  R (m, 3, 3), t (m, 3).  Returns (R, t, score)
    with score (m,) the RMS distance of the kept pairs.
    """
    m = len(R)
    for it in range(iterations + 1):
        X = np.einsum("mij,pj->mpi", R, P) + t[:, None, :]
        d, j = tree.query(X.reshape(-1, 3))
        d = d.reshape(m, -1)
        cut = np.quantile(d, keep, axis=1)[:, None]
        w = (d <= cut).astype(np.float64)
        score = np.sqrt(np.sum(w * d**2, axis=1) / np.maximum(w.sum(axis=1), 1))
        if it == iterations:
            break
        R, t = _kabsch_batch(P, W[j].reshape(m, -1, 3), w)
    return R, t, score


def _starts(part_pts, part_w, whole_pts, whole_w, same_frame_t) -> tuple[np.ndarray, np.ndarray]:
    """Starting rotations and translations: the scanners' shared frame first, then every
    principal-axis pairing and fixed pseudo-random rotations, each with the part's centroid
    at the whole's centroid or half a standard deviation off along a principal axis."""
    rots = ex.candidate_rotations(part_pts, part_w, whole_pts, whole_w, False)
    rots = np.concatenate([rots, Rotation.random(N_RANDOM_ROTATIONS, random_state=1234).as_matrix()])
    axes = ex.principal_frame(whole_pts, whole_w)
    sd = np.sqrt(whole_w @ (whole_pts @ axes) ** 2 / whole_w.sum())
    offsets = [np.zeros(3)] + [s * 0.5 * sd[a] * axes[:, a] for a in range(3) for s in (1.0, -1.0)]
    R = np.concatenate([np.eye(3)[None], np.repeat(rots, len(offsets), axis=0)])
    t = np.concatenate([same_frame_t[None], np.tile(np.array(offsets), (len(rots), 1))])
    return R, t


def _landmark_start(part: Surface, whole: Surface, pairs: np.ndarray, r: float):
    """Rotation and translation of the part's landmarks onto the whole's (Kabsch), in the
    frames of :func:`place_part`; pairs (l, 2) as (part vertex, whole vertex)."""
    a = (part.vertices[pairs[:, 0]] - part.centroid) / r
    b = (whole.vertices[pairs[:, 1]] - whole.centroid) / r
    R, t, _ = kabsch(a, b)
    return R, t


def _rival(R: np.ndarray, score: np.ndarray, pick: int) -> dict | None:
    """The best refined pose turned by more than RIVAL_ANGLE_DEG from the chosen one."""
    out = None
    for i in range(len(R)):
        angle = float(np.degrees(ex.rotation_angle(R[i] @ R[pick].T)))
        ratio = float(score[i] / max(score[pick], 1e-300))
        if angle > RIVAL_ANGLE_DEG and (out is None or ratio < out["energy_ratio"]):
            out = {"energy_ratio": ratio, "angle_deg": angle}
    return out


def place_part(part: Surface, whole: Surface, seed: int, opts, pairs: np.ndarray) -> dict:
    """Rigid pose of the part in the whole's frame (both centred, divided by the whole's RMS
    radius): the best of many trimmed-ICP starts.  The first start (the scanners' shared
    frame, or with three or more landmark pairs (l, 2) their Kabsch pose) is preferred on
    near-ties.  Returns the frames, the pose, its misfit and the best rival pose."""
    r = _rms_radius(whole)
    P = (part.vertices - part.centroid) / r
    W = (whole.vertices - whole.centroid) / r
    tree = cKDTree(W)
    coarse = P[farthest_points(P, min(150, part.n_vertices), seed=seed)]
    R, t = _starts(P, part.vertex_areas, W, whole.vertex_areas, (part.centroid - whole.centroid) / r)
    if len(pairs) >= 3:
        R[0], t[0] = _landmark_start(part, whole, pairs, r)
    elif opts.same_orientation:
        near = np.array([ex.rotation_angle(x) <= np.deg2rad(tuning.SAME_ORIENTATION_DEG) for x in R])
        R, t = R[near], t[near]
    R, t, score = trimmed_icp(coarse, tree, W, R, t, 8)
    best = list(np.argsort(score)[:N_REFINED])
    if 0 not in best:
        best.append(0)  # the preferred start is always refined
    fine = P[farthest_points(P, min(opts.n_samples, part.n_vertices), seed=seed)]
    R, t, score = trimmed_icp(fine, tree, W, R[best], t[best], 30)
    pick = int(np.argmin(score))
    first = best.index(0)
    if score[first] <= SAME_FRAME_WITHIN * score[pick] or len(pairs) >= 3:
        pick = first
    return {"P": P, "W": W, "tree": tree, "radius": r, "R": R[pick], "t": t[pick],
            "score": float(score[pick]), "shared_frame": pick == first and len(pairs) < 3,
            "rival": _rival(R, score, pick)}


# ------------------------------------------------------------------ smooth deformation
def _solve_field(B, rows_f, target_f, rows_b, target_b, base, reg):
    """Least-squares coefficients A (k, 3) of ``base + B @ A`` fitted to the pairs
    (rows_f -> target_f) and (rows_b -> target_b), with the penalty `reg` (k, k)."""
    Bf, Bb = B[rows_f], B[rows_b]
    lhs = Bf.T @ Bf + Bb.T @ Bb + reg
    rhs = Bf.T @ (target_f - base[rows_f]) + Bb.T @ (target_b - base[rows_b])
    return np.linalg.solve(lhs, rhs)


def _segment_distance(points: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Distance of each point (q, 3) to the nearest of the segments a-b (e, 3), in chunks."""
    ab = b - a
    L2 = np.maximum(np.einsum("ij,ij->i", ab, ab), 1e-300)
    out = np.empty(len(points))
    for start in range(0, len(points), 512):
        q = points[start:start + 512, None, :]
        t = np.clip(np.einsum("qej,ej->qe", q - a[None], ab) / L2, 0.0, 1.0)
        foot = a[None] + t[..., None] * ab[None]
        out[start:start + 512] = np.sqrt(np.min(np.sum((q - foot) ** 2, axis=2), axis=1))
    return out


def covered_by(part: Surface, moved: np.ndarray, points: np.ndarray,
               tree: cKDTree | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Which `points` lie over the placed part (`moved` (n_part, 3) its vertices), and the
    nearest part vertex of each.

    A point lies beyond the cut when its closest point on the part's triangles is
    on the part's boundary: then its distance to the boundary curve equals its
    distance to the surface; over the part, the surface is nearer.  Only points whose
    nearest part vertex is within one ring of the boundary are tested."""
    tree = cKDTree(moved) if tree is None else tree
    _, near = tree.query(points)
    covered = np.ones(len(points), dtype=bool)
    edges = part.connectivity.boundary_edges
    if not len(edges):
        return covered, near
    band = np.asarray(part.connectivity.vertex_adjacency(self_loops=True)
                      @ part.connectivity.boundary_vertices.astype(np.float64) > 0).ravel()
    test = np.flatnonzero(band[near])
    if len(test):
        q = points[test]
        foot, _ = closest_on_faces(q, moved, part.faces, near_faces(part, near[test], 1))
        d_surface = np.linalg.norm(foot - q, axis=1)
        d_edge = _segment_distance(q, moved[edges[:, 0]], moved[edges[:, 1]])
        covered[test] = d_edge - d_surface > 1e-9 * (1.0 + d_edge)
    return covered, near


def deform_part(part: Surface, placed: dict, opts, seed: int) -> np.ndarray:
    """The part's vertices after the rigid pose, an affine map and a smooth displacement in
    its low eigenfunctions (in the whole's frame), (n_part, 3).

    Pairs: each part sample with its closest whole vertex (the worst 10% trimmed),
    and each whole vertex that the part covers (:func:`covered_by`) with its nearest
    part vertex, so the whole's missing region pulls nothing.  The displacement is
    penalised by ``DEFORM_STIFFNESS`` times the eigenvalues, as in
    :func:`~.extrinsic.spectral_nonrigid_icp`.
    """
    P, W, tree = placed["P"], placed["W"], placed["tree"]
    X1 = np.hstack([P @ placed["R"].T + placed["t"], np.ones((len(P), 1))])
    affine = np.vstack([np.eye(3), np.zeros((1, 3))])
    sizes = [k for k in DEFORM_SIZES if k <= opts.deform_k]
    phi, values = np.zeros((len(P), 0)), np.zeros(0)
    if sizes:
        basis = eigenbasis(part, max(max(sizes), 2))
        area = float(basis.mass.sum())
        phi, values = np.asarray(basis.vectors) * np.sqrt(area), np.asarray(basis.values) * area
        sizes = [min(k, phi.shape[1]) for k in sizes]
    samples = farthest_points(P, min(opts.n_samples, part.n_vertices), seed=seed)
    schedule = [0] * (tuning.AFFINE_ICP_ITERATIONS if opts.affine else 0)
    schedule += [k for k in sizes for _ in range(tuning.DEFORM_ITERATIONS)]
    A = np.zeros((0, 3))
    for k in schedule:
        current = X1 @ affine + phi[:, :len(A)] @ A
        d, j = tree.query(current[samples])
        keep = d <= np.quantile(d, TRIM_KEEP)
        cov, near = covered_by(part, current, W)
        pairs = (samples[keep], W[j[keep]], near[cov], W[cov])
        if k == 0:
            affine = _solve_field(X1, *pairs, np.zeros((len(P), 3)), 1e-9 * np.eye(4))
        else:
            reg = tuning.DEFORM_STIFFNESS * len(samples) * np.diag(values[:k])
            A = _solve_field(phi[:, :k], *pairs, X1 @ affine, reg)
    return X1 @ affine + phi[:, :len(A)] @ A


# ------------------------------------------------------------------ the partial route
def _round_trip_confidence(points: np.ndarray, there: np.ndarray, back: np.ndarray,
                           unit: float) -> np.ndarray:
    """exp(-(d / width)²) of the round-trip distance d of each point (`unit` mm per solver unit)."""
    d = np.linalg.norm(points[back[there]] - points, axis=1) / unit
    return np.exp(-((d / tuning.CONFIDENCE_WIDTH) ** 2))


def _spectral_checks(part: Surface, whole: Surface, p2w: np.ndarray, covered: np.ndarray,
                     k: int) -> tuple[np.ndarray, dict]:
    """The part-by-whole functional map of the point map, its slanted-diagonal slope, and how
    well its soft indicator agrees with the covered region."""
    bp, bw = eigenbasis(part, k), eigenbasis(whole, k)
    C = overlap_fmap(np.asarray(bp.vectors), bp.mass, np.asarray(bw.vectors), p2w)
    v = soft_indicator(C, np.asarray(bp.vectors), bp.mass, np.asarray(bw.vectors))
    inside = v > 0.5
    agree = float(np.sum(inside & covered) / max(np.sum(inside | covered), 1))
    return C, {"fmap_slope": slanted_slope(C), "indicator_iou": agree}


def match_partial(source: Surface, target: Surface, opts, seed: int, found: dict) -> dict:
    """Map the part into the whole (see the module notes); the fields of a Correspondence.

    Returns ``source_to_target``, ``target_to_source``, ``functional_map`` (target by
    source, integrated over the covered region), both confidences (0 on the whole
    outside the covered region), ``source_overlap`` / ``target_overlap`` (all True on
    the part) and ``info["partial"]``.
    """
    from .pose import rigid_pose

    part_is_source = found["side"] == "source"
    part, whole = (source, target) if part_is_source else (target, source)
    pairs = np.asarray(opts.landmarks, dtype=np.int64).reshape(-1, 2)
    placed = place_part(part, whole, seed, opts, pairs if part_is_source else pairs[:, ::-1])
    moved = deform_part(part, placed, opts, seed)
    W, r = placed["W"], placed["radius"]
    _, p2w = placed["tree"].query(moved)
    covered, w2p = covered_by(part, moved, W)
    unit = 1.0 / (np.sqrt(4.0 * np.pi) * r)  # the solver's unit-size frame, in W's units
    conf_part = _round_trip_confidence(moved, p2w, w2p, unit)
    conf_whole = _round_trip_confidence(W, w2p, p2w, unit) * covered
    _, checks = _spectral_checks(part, whole, p2w, covered, opts.n_eigen)
    every = np.ones(part.n_vertices, dtype=bool)
    if part_is_source:
        s2t, t2s, ov_s, ov_t, conf_s, conf_t = p2w, w2p, every, covered, conf_part, conf_whole
    else:
        s2t, t2s, ov_s, ov_t, conf_s, conf_t = w2p, p2w, covered, every, conf_whole, conf_part
    rigid, rounds = rigid_pose(source, target, s2t, conf_s * ov_s)
    bs, bt = eigenbasis(source, opts.n_eigen), eigenbasis(target, opts.n_eigen)
    C = overlap_fmap(np.asarray(bt.vectors), bt.mass, np.asarray(bs.vectors), t2s, ov_t)
    share = float(whole.vertex_areas[covered].sum() / whole.area)
    info = {**found, "covered_fraction_of_whole": share,
            "pose_misfit_mm": placed["score"] * r, "shared_frame": bool(placed["shared_frame"]),
            **checks, "rigid_pose_rounds": rounds}
    if 0 < len(pairs) < 3:
        info["landmarks_note"] = "fewer than 3 landmark pairs: not used by the partial route"
    return {"source_to_target": s2t, "target_to_source": t2s, "functional_map": C,
            "confidence": conf_t, "source_confidence": conf_s, "rigid": rigid,
            "similarity": rigid, "source_overlap": ov_s, "target_overlap": ov_t,
            "info": {"route": "partial", "partial": info,
                     "rotation_ambiguity": _ambiguity(placed["rival"], len(pairs))}}


def _ambiguity(rival: dict | None, n_landmarks: int) -> dict | None:
    """The turn verdict of the partial route (keys as the whole-to-whole probe's), with an
    :class:`AmbiguousMatchWarning` when a pose turned by more than RIVAL_ANGLE_DEG fits
    within RIVAL_WITHIN of the chosen one; None with three or more landmark pairs."""
    if n_landmarks >= 3:
        return None
    flip = rival is not None and rival["energy_ratio"] < RIVAL_WITHIN
    if flip:
        warnings.warn(
            f"a placement of the part turned by {rival['angle_deg']:.0f} degrees fits almost as "
            f"well (misfit ratio {rival['energy_ratio']:.3f}, below {RIVAL_WITHIN}): the map may "
            "be turned; give three landmark pairs (MatchOptions.landmarks, or --landmarks on the "
            "command line) to fix it", AmbiguousMatchWarning, stacklevel=4)
    return {"ambiguous": bool(flip), "flip": bool(flip), "rival": rival, "axis": 0,
            "ratio": rival["energy_ratio"] if rival else None, "turns": 0}
