"""Ground-truth surface pairs for the correspondence tests and benchmarks (synthetic, invented shapes).

A module of the test suite (tests import it plainly); the benchmark scripts import it
from here too.

Each pair is one organ-like shape (:func:`surfacekit.mesh.synthetic.organ_surface`)
meshed twice from independent sphere triangulations of different resolution; the
target is then deformed by a known deformation and moved by a random rigid
motion.  Both meshes carry their sphere parameters, so the true match of any
vertex is the point of the other mesh with the same sphere parameter, located
inside a triangle with barycentric coordinates.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

import surfacekit as sk


# ------------------------------------------------------------ deformations
def bending(curvature: float = 1.0 / 150.0, axis: int = 0, toward: int = 1):
    """Bend along `axis` (longest extent) into an arc of `curvature` 1/mm; isometric along the axis."""
    def deform(p, sphere):
        c = p.mean(axis=0)
        q = p - c
        R = 1.0 / curvature
        s, h = q[:, axis], q[:, toward]
        out = q.copy()
        out[:, axis] = (R - h) * np.sin(s / R)
        out[:, toward] = R - (R - h) * np.cos(s / R)
        return out + c
    return deform


def local_growth(amplitude: float = 0.25, width: float = 0.5, seed: int = 0, n_bumps: int = 2):
    """Radial growth (+) and shrinkage (-) bumps around random sphere points.

    Each vertex moves away from / towards the centroid by ``amplitude × exp(-(d/width)²)``
    of its distance, d = chord distance on the parameter sphere.
    """
    rng = np.random.default_rng(seed)
    centres = rng.standard_normal((n_bumps, 3))
    centres /= np.linalg.norm(centres, axis=1, keepdims=True)
    signs = np.where(np.arange(n_bumps) % 2 == 0, 1.0, -0.6)

    def deform(p, sphere):
        c = p.mean(axis=0)
        g = np.zeros(len(p))
        for ctr, sg in zip(centres, signs):
            g += sg * amplitude * np.exp(-(np.linalg.norm(sphere - ctr, axis=1) / width) ** 2)
        return c + (p - c) * (1.0 + g)[:, None]
    return deform


def anisotropic_growth(factors=(1.15, 0.92, 1.05), seed: int = 0):
    """Growth by different factors along three random orthogonal directions."""
    Q = sk.synthetic.random_rotation(seed + 1000)
    A = Q @ np.diag(factors) @ Q.T

    def deform(p, sphere):
        c = p.mean(axis=0)
        return c + (p - c) @ A.T
    return deform


def noise(sigma_mm: float = 0.3, seed: int = 0):
    """Independent Gaussian noise of `sigma_mm` on every coordinate (scanner noise)."""
    def deform(p, sphere):
        return p + np.random.default_rng(seed).normal(0.0, sigma_mm, p.shape)
    return deform


def twisting(total_deg: float, axis: int = 0, length: float = 130.0):
    """Twist about `axis` through the centroid: cross-sections turn by `total_deg` from end to end."""
    def deform(p, sphere):
        c = p.mean(axis=0)
        q = p - c
        a = np.deg2rad(total_deg) * q[:, axis] / length
        i, j = [k for k in range(3) if k != axis]
        out = q.copy()
        out[:, i] = np.cos(a) * q[:, i] - np.sin(a) * q[:, j]
        out[:, j] = np.sin(a) * q[:, i] + np.cos(a) * q[:, j]
        return out + c
    return deform


def compose(*deforms):
    """Apply deformations in order."""
    def deform(p, sphere):
        for d in deforms:
            p = d(p, sphere)
        return p
    return deform


# ------------------------------------------------------- ground-truth maps
def locate_on_sphere_mesh(sphere_vertices: np.ndarray, faces: np.ndarray, points: np.ndarray):
    """Triangle and barycentric coordinates of unit-sphere `points` on a sphere triangulation.

    The triangle hit by the ray from the centre through each point; candidates are
    the faces around the 4 nearest vertices.  Returns ``(face (q,), bary (q, 3))``.
    """
    n = len(sphere_vertices)
    inc = np.full((n, 16), -1, dtype=np.int64)
    order = np.argsort(faces.ravel(), kind="stable")
    vid = faces.ravel()[order]
    fid = order // 3
    first = np.searchsorted(vid, np.arange(n))
    slot = np.arange(len(vid)) - first[vid]
    keep = slot < 16
    inc[vid[keep], slot[keep]] = fid[keep]
    _, near = cKDTree(sphere_vertices).query(points, k=4)
    cand = inc[near].reshape(len(points), -1)  # (q, 64)
    valid = cand >= 0
    cf = faces[np.where(valid, cand, 0)]  # (q, 64, 3)
    T = sphere_vertices[cf].transpose(0, 1, 3, 2)  # columns = corners
    lam = np.linalg.solve(T, np.broadcast_to(points[:, None, :], T.shape[:2] + (3,))[..., None])[..., 0]
    score = np.where(valid, lam.min(axis=2), -np.inf)
    best = np.argmax(score, axis=1)
    rows = np.arange(len(points))
    bary = lam[rows, best]
    bary = np.clip(bary, 0, None)
    bary /= bary.sum(axis=1, keepdims=True)
    return cand[rows, best], bary


@dataclass
class Pair:
    """A ground-truth pair: surfaces, the true maps and a description."""

    name: str
    source: sk.Surface
    target: sk.Surface
    target_truth: tuple   # (face on source (n_t,), barycentric (n_t, 3)): true point of each target vertex
    source_truth: tuple   # (face on target (n_s,), barycentric (n_s, 3)): true point of each source vertex


#: length (mm) of each organ kind along its bending axis (x), to bend each by the same angle
LENGTHS = {"kidney": 110.0, "liver": 200.0, "hippocampus": 45.0, "ventricle": 90.0, "sphere": 60.0}
BEND_ANGLE = np.deg2rad(50.0)

DEFORMATIONS = {
    "bend": lambda seed: bending(BEND_ANGLE / 110.0),
    "growth": lambda seed: local_growth(0.15, 0.5, seed=seed),
    "anisotropic": lambda seed: anisotropic_growth(seed=seed),
    "noise": lambda seed: noise(0.4, seed=seed),
    "mixed": lambda seed: compose(bending(0.5 * BEND_ANGLE / 110.0), local_growth(0.1, 0.6, seed=seed),
                                  anisotropic_growth((1.08, 0.95, 1.0), seed=seed), noise(0.2, seed=seed)),
}


def make_pair(kind: str, deformation: str, *, n_source: int = 3000, n_target: int = 3600,
              seed: int = 0, rotate: bool = True, rotation_seed: int | None = None,
              deform=None) -> Pair:
    """One ground-truth pair; the target is deformed, randomly rotated and translated.

    The rotation and translation come from `rotation_seed` (default: `seed`), so the
    same pair can be posed in many ways.  `deform` (a callable as in
    :func:`surfacekit.synthetic.organ_surface`) replaces the named `deformation`,
    which then only names the pair.
    """
    src, sp_s = sk.synthetic.organ_surface(kind, n_source, seed=2 * seed + 1, jitter=0.3)
    if deform is None and deformation != "none":
        deform = DEFORMATIONS[deformation](seed)
    if deformation == "bend":  # the same bending angle whatever the organ's length
        deform = bending(BEND_ANGLE / LENGTHS[kind])
    tgt, sp_t = sk.synthetic.organ_surface(kind, n_target, seed=2 * seed + 2, jitter=0.3, deform=deform)
    if rotate:
        rs = seed if rotation_seed is None else rotation_seed
        R = sk.synthetic.random_rotation(rs)
        shift = np.random.default_rng(rs).normal(0, 50.0, 3)
        tgt = sk.Surface(tgt.vertices @ R.T + shift, tgt.faces, metadata=dict(tgt.metadata))
    return Pair(
        name=f"{kind}/{deformation}/seed{seed}" + ("" if rotation_seed is None else f"/pose{rotation_seed}"),
        source=src, target=tgt,
        target_truth=locate_on_sphere_mesh(sp_s, src.faces, sp_t),
        source_truth=locate_on_sphere_mesh(sp_t, tgt.faces, sp_s),
    )


def true_landmarks(pair: Pair, n: int = 3, seed: int = 5) -> tuple:
    """`n` well-spread source vertices and the target vertices nearest their true images,
    as ``((source, target), ...)`` for :class:`surfacekit.MatchOptions` — what an expert
    would place (e.g. the apex and the two junctions of the right ventricle on a left
    ventricle, common practice in cardiac imaging)."""
    from surfacekit.mesh.sampling import farthest_points

    ids = farthest_points(pair.source.vertices, n, seed=seed)
    face, bary = pair.source_truth
    pts = np.einsum("nk,nkd->nd", bary[ids], pair.target.vertices[pair.target.faces[face[ids]]])
    tids = cKDTree(pair.target.vertices).query(pts)[1]
    return tuple(zip(ids.tolist(), tids.tolist()))


KINDS = ("kidney", "liver", "hippocampus", "ventricle")

#: length (mm) of the synthetic tube along its axis (``organ_map("tube")``)
TUBE_LENGTH = 130.0


def tube_pair(bend_deg: float, twist_deg: float = 30.0, *, n_source: int = 1500, n_target: int = 1800,
              seed: int = 0) -> Pair:
    """A tube and its copy twisted by `twist_deg` and bent by `bend_deg` (an arc over the whole
    length, isometric along the axis), in a random pose, meshed independently."""
    deform = compose(twisting(twist_deg, length=TUBE_LENGTH),
                     bending(np.deg2rad(bend_deg) / TUBE_LENGTH))
    pair = make_pair("tube", "strong-bend", n_source=n_source, n_target=n_target, seed=seed,
                     deform=deform)
    pair.name = f"tube/bend{bend_deg:.0f}/twist{twist_deg:.0f}/seed{seed}"
    return pair


def tube_pairs(n_source: int = 1500, n_target: int = 1800, n: int = 12) -> list[Pair]:
    """`n` bent tube pairs with bends spread over 60-150 degrees, twists of 0-45 degrees (seeds 300+)."""
    bends = np.linspace(60.0, 150.0, n)
    return [tube_pair(float(b), float(45.0 * ((i * 5) % 7) / 6.0), n_source=n_source, n_target=n_target,
                      seed=300 + i) for i, b in enumerate(bends)]


def benchmark_seed(s: int, i: int, j: int) -> int:
    """Generator seed of benchmark round `s`, organ kind `i`, deformation `j`."""
    return 100 * s + 7 * i + j


def benchmark_pairs(n_source: int = 3000, n_target: int = 3600, seeds=(0, 1)) -> list[Pair]:
    """Every organ kind with every deformation, for each seed (random rotation per pair)."""
    return [make_pair(k, d, n_source=n_source, n_target=n_target, seed=benchmark_seed(s, i, j))
            for s in seeds for i, k in enumerate(KINDS) for j, d in enumerate(DEFORMATIONS)]


#: Generator seeds the solver's constants were tuned on (its energy weights and the
#: ambiguity thresholds in ``surfacekit.correspondence``): the pair table of
#: ``benchmarks/bench_match.py`` (``benchmark_pairs`` with seeds (0, 1)), its pose sweep
#: (seeds 50-53) and its 8000-vertex pairs (seeds 0-2).  Tests that check those constants
#: use other seeds (held out), and assert so with :func:`held_out`.
TUNING_SEEDS = frozenset(
    {benchmark_seed(s, i, j) for s in (0, 1) for i in range(len(KINDS)) for j in range(len(DEFORMATIONS))}
    | set(range(50, 50 + len(KINDS))) | {0, 1, 2})


def held_out(*seeds: int) -> tuple:
    """`seeds`, after checking that none of them is a tuning seed."""
    tuned = sorted(set(seeds) & TUNING_SEEDS)
    if tuned:
        raise ValueError(f"seeds {tuned} were used to tune the solver; a test needs held-out seeds")
    return seeds
