"""Placing a cropped part on the whole surface and deforming it there (the fitting steps of
:mod:`.partial`), in the whole's frame: both surfaces centred, divided by the whole's RMS radius.

Rigid placement: trimmed ICP (Chetverikov, Svirko, Stepanov & Krsek, "The trimmed iterative
closest point algorithm", ICPR 2002) from many starting poses at once, closest points taken
from the part only, point-to-plane steps (Chen & Medioni, Image Vision Comput. 1992).
Deformation: an affine map, then a smooth displacement in the part's low Laplace–Beltrami
eigenfunctions, pulled by the part's closest points and by the whole's covered region only.
"""
from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree
from scipy.spatial.transform import Rotation

from ..mesh.eigen import eigenbasis
from ..mesh.proximity import closest_on_faces, near_faces, outward_vertex_normals
from ..mesh.sampling import farthest_points
from ..mesh.surface import Surface
from . import extrinsic as ex
from . import tuning
from .alignment import kabsch

#: share of the part's closest-point pairs kept in each trimmed ICP step (the rest, the worst,
#: are dropped: growth or a slightly wrong crop should not pull the pose)
TRIM_KEEP = 0.9
#: fixed pseudo-random rotations tried besides the principal-axis pairings (a part's principal
#: axes need not agree with the whole's)
N_RANDOM_ROTATIONS = 96
#: starting poses kept after the coarse batched ICP, refined on more points
N_REFINED = 10
#: a start in the scanners' shared frame wins when its misfit is within this factor of the best,
#: or within SAME_FRAME_SLACK (a share of the whole's RMS radius) of it: a symmetric part fits
#: everywhere alike, to the triangulation's precision; then nothing tells the frames apart.
#: Measured: a hemisphere's refined poses fit to 6.1e-4-6.5e-4; with a slack of 2e-3 the flipped
#: shared-frame pose of a cropped noisy ventricle (misfits near 0.011) won on the benchmark
SAME_FRAME_WITHIN = 1.05
SAME_FRAME_SLACK = 2e-4
#: a refined pose turned by more than this (degrees) from the chosen one counts as a rival
#: (nearby poses are the same basin reached twice)
RIVAL_ANGLE_DEG = 60.0
#: refined poses whose rigid misfit is within this factor of the best are compared after an
#: affine fit (a turned cropped ventricle under anisotropic growth: 1.11)
RERANK_WITHIN = 1.5
#: eigenfunctions of the part in the smooth deformation, coarse to fine
DEFORM_SIZES = (3, 6, 10)


def rms_radius(s: Surface) -> float:
    w = s.vertex_areas / s.area
    return float(np.sqrt(w @ np.sum((s.vertices - s.centroid) ** 2, axis=1)))



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


def _plane_step(X: np.ndarray, N: np.ndarray, off: np.ndarray, w: np.ndarray):
    """Small rigid motions (rotation about the origin, translation) minimising the weighted
    linearised point-to-plane residuals ``off + ω·(x × n) + τ·n`` of m starts at once (Low, UNC
    Tech. Rep. TR04-004, 2004).  X, N (m, p, 3), off, w (m, p).  Turns are capped at 0.3 rad."""
    J = np.concatenate([np.cross(X, N), N], axis=2)
    A = np.einsum("mp,mpi,mpj->mij", w, J, J) + 1e-9 * np.eye(6)
    b = -np.einsum("mp,mpi,mp->mi", w, J, off)
    delta = np.linalg.solve(A, b[..., None])[..., 0]
    turn = delta[:, :3]
    size = np.linalg.norm(turn, axis=1, keepdims=True)
    turn = turn * np.minimum(1.0, 0.3 / np.maximum(size, 1e-300))
    return Rotation.from_rotvec(turn).as_matrix(), delta[:, 3:]


def trimmed_icp(P: np.ndarray, tree: cKDTree, W: np.ndarray, N: np.ndarray, R: np.ndarray,
                t: np.ndarray, iterations: int, keep: float = TRIM_KEEP, plane_from: int = 0):
    """Trimmed ICP of the part's points P (p, 3) into the whole, from m starts at once.

    Each step pairs every part point with its closest whole vertex (W (n, 3), unit
    normals N (n, 3)), keeps the best `keep` share of the pairs of each start by their
    point-to-plane distance (trimmed ICP, Chetverikov, Svirko, Stepanov & Krsek, ICPR
    2002) and refits the pose: by Kabsch on the point pairs for the first `plane_from`
    steps (a wide basin), then by point-to-plane steps (Chen & Medioni, Image Vision
    Comput. 1992), which converge fast and are not held to the whole's vertex spacing.
    R (m, 3, 3), t (m, 3).  Returns (R, t, score) with score (m,) the RMS
    point-to-plane distance of the kept pairs.
    """
    for it in range(iterations + 1):
        X = np.einsum("mij,pj->mpi", R, P) + t[:, None, :]
        _, j = tree.query(X.reshape(-1, 3))
        Wj, Nj = W[j].reshape(X.shape), N[j].reshape(X.shape)
        off = np.einsum("mpi,mpi->mp", X - Wj, Nj)
        d = np.abs(off)
        w = (d <= np.quantile(d, keep, axis=1)[:, None]).astype(np.float64)
        score = np.sqrt(np.sum(w * d**2, axis=1) / np.maximum(w.sum(axis=1), 1))
        if it == iterations:
            break
        if it < plane_from:
            R, t = _kabsch_batch(P, Wj, w)
        else:
            dR, dt = _plane_step(X, Nj, off, w)
            R, t = dR @ R, np.einsum("mij,mj->mi", dR, t) + dt
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


def _distinct(R: np.ndarray, t: np.ndarray, score: np.ndarray, n: int) -> list[int]:
    """The `n` best-scoring poses, skipping any within DISTINCT_POSE_DEG and 0.1 radius of a kept
    one (many starts fall into the same basin)."""
    keep: list[int] = []
    for i in np.argsort(score):
        if all(ex.rotation_angle(R[i] @ R[k].T) > np.deg2rad(tuning.DISTINCT_POSE_DEG)
               or np.linalg.norm(t[i] - t[k]) > 0.1 for k in keep):
            keep.append(int(i))
        if len(keep) == n:
            break
    return keep


def place_part(part: Surface, whole: Surface, seed: int, opts, pairs: np.ndarray) -> dict:
    """Rigid pose of the part in the whole's frame (both centred, divided by the whole's RMS
    radius): the best of many trimmed-ICP starts.  The first start (the scanners' shared
    frame, or with three or more landmark pairs (l, 2) their Kabsch pose) is preferred on
    near-ties.  Returns the frames, the pose, its misfit and the best rival pose."""
    r = rms_radius(whole)
    P = (part.vertices - part.centroid) / r
    W = (whole.vertices - whole.centroid) / r
    N = outward_vertex_normals(whole)
    tree = cKDTree(W)
    coarse = P[farthest_points(P, min(150, part.n_vertices), seed=seed)]
    R, t = _starts(P, part.vertex_areas, W, whole.vertex_areas, (part.centroid - whole.centroid) / r)
    if len(pairs) >= 3:
        R[0], t[0] = _landmark_start(part, whole, pairs, r)
    elif opts.same_orientation:
        near = np.array([ex.rotation_angle(x) <= np.deg2rad(tuning.SAME_ORIENTATION_DEG) for x in R])
        R, t = R[near], t[near]
    R, t, score = trimmed_icp(coarse, tree, W, N, R, t, 12, plane_from=6)
    best = _distinct(R, t, score, N_REFINED)
    if 0 not in best:
        best.append(0)  # the preferred start is always refined
    fine = P[farthest_points(P, min(opts.n_samples, part.n_vertices), seed=seed)]
    R, t, score = trimmed_icp(fine, tree, W, N, R[best], t[best], 20)
    pick = int(np.argmin(score))
    first = best.index(0)
    if score[first] <= max(SAME_FRAME_WITHIN * score[pick], score[pick] + SAME_FRAME_SLACK) \
            or len(pairs) >= 3:
        pick = first
    return {"P": P, "W": W, "N": N, "tree": tree, "radius": r, "R": R[pick], "t": t[pick],
            "score": float(score[pick]), "shared_frame": pick == first and len(pairs) < 3,
            "fixed": len(pairs) >= 3, "rival": _rival(R, score, pick),
            "refined": (R, t, score)}


def fit_misfit(part: Surface, placed: dict, opts, seed: int) -> tuple[float, np.ndarray]:
    """Trimmed RMS point-to-plane misfit of the part after its pose, the affine fit and the
    smooth deformation (:func:`deform_part`), and the deformed vertices."""
    moved = deform_part(part, placed, opts, seed)
    _, j = placed["tree"].query(moved)
    d = np.abs(np.einsum("ij,ij->i", moved - placed["W"][j], placed["N"][j]))
    d = np.sort(d)[: max(1, int(TRIM_KEEP * len(d)))]
    return float(np.sqrt(np.mean(d**2))), moved


def rerank(part: Surface, placed: dict, opts, seed: int) -> dict:
    """Among the refined poses whose rigid misfit is within RERANK_WITHIN of the best and that
    are turned by more than RIVAL_ANGLE_DEG from each other, keep the one that fits best
    after the affine map and the smooth deformation of :func:`deform_part`: anisotropic growth
    can make a turned rigid pose, or even a turned affine fit, fit a little better, but the
    smooth deformation absorbs the growth and leaves the wrong pose's shape mismatch
    (measured on a cropped ventricle under anisotropic growth: rigid 0.0229 wrong against
    0.0254 right, affine 0.0067 against 0.0091, deformed 0.0030 against 0.0026).  The rival
    is judged the same way; ``placed["moved"]`` keeps the chosen deformed vertices."""
    if placed["fixed"] or placed["shared_frame"]:
        return placed
    R, t, score = placed["refined"]
    close: list[int] = []
    for i in np.argsort(score):
        if score[i] > RERANK_WITHIN * score.min() or len(close) == 3:
            break
        if all(ex.rotation_angle(R[i] @ R[k].T) > np.deg2rad(RIVAL_ANGLE_DEG) for k in close):
            close.append(int(i))
    if len(close) < 2:
        return placed
    fits = [fit_misfit(part, {**placed, "R": R[i], "t": t[i]}, opts, seed) for i in close]
    misfit = np.array([f[0] for f in fits])
    best = int(np.argmin(misfit))
    pick = close[best]
    rival = _rival(R[close], misfit, best)
    return {**placed, "R": R[pick], "t": t[pick], "score": float(score[pick]), "rival": rival,
            "misfit": float(misfit[best]), "moved": fits[best][1], "reranked": True}


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
