"""Cropped ground-truth pairs for the partial-correspondence tests and benchmark (synthetic shapes).

A module of the test suite (tests import it plainly); ``benchmarks/bench_match.py --partial``
imports it from here too.  A pair of :mod:`groundtruth` is cropped: the follow-up (target)
loses the part of its surface beyond a plane at a random position and angle, as a field of
view or a slab protocol that stops short would cut it.  The faces whose centroid lies beyond
the plane are dropped (a cut along the triangulation, like a segmentation truncated at the
image border).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from groundtruth import Pair, make_pair

import surfacekit as sk


@dataclass
class PartialPair:
    """A whole source, a cropped target, and what the crop left.

    kept : (n_target_uncropped,) int, the kept target vertices (target vertex i is
        uncropped vertex kept[i]); covered : (n_source,) bool, source vertices whose true
        partner lies on a kept face; cut_share : share of the target's area cut away.
    """

    name: str
    source: sk.Surface
    target: sk.Surface
    whole_target: sk.Surface
    target_truth: tuple
    covered: np.ndarray
    cut_share: float
    source_truth: tuple = ()  # (face on whole_target, barycentric) of each source vertex


def keep_faces(s: sk.Surface, keep_face: np.ndarray) -> tuple[sk.Surface, np.ndarray]:
    """The surface made of the kept faces, and the kept vertex indices (old numbering)."""
    faces = s.faces[keep_face]
    kept = np.unique(faces)
    index = np.full(s.n_vertices, -1, dtype=np.int64)
    index[kept] = np.arange(len(kept))
    return sk.Surface(s.vertices[kept], index[faces]), kept


def plane_crop(s: sk.Surface, share: float, seed: int) -> tuple[np.ndarray, float]:
    """Faces kept by a plane of random direction placed so that about `share` of the area is
    cut away (bisection on the offset); returns (kept face mask, the share cut)."""
    rng = np.random.default_rng(seed)
    n = rng.standard_normal(3)
    n /= np.linalg.norm(n)
    h = (s.vertices[s.faces].mean(axis=1) - s.centroid) @ n
    order = np.argsort(-h)
    cum = np.cumsum(s.face_areas[order]) / s.area
    cut = np.zeros(s.n_faces, dtype=bool)
    cut[order[: int(np.searchsorted(cum, share)) + 1]] = True
    return ~cut, float(s.face_areas[cut].sum() / s.area)


def largest_piece(s: sk.Surface, keep_face: np.ndarray) -> np.ndarray:
    """Kept faces restricted to the largest connected piece (a plane may leave a scrap)."""
    piece, _ = keep_faces(s, keep_face)
    if piece.n_components == 1:
        return keep_face
    labels, areas = piece.component_areas()
    out = keep_face.copy()
    out[np.flatnonzero(keep_face)[labels != int(np.argmax(areas))]] = False
    return out


def crop_pair(pair: Pair, share: float, seed: int) -> PartialPair:
    """`pair` with about `share` of its target's area cut away by a random plane."""
    keep_face, _ = plane_crop(pair.target, share, seed)
    keep_face = largest_piece(pair.target, keep_face)
    target, kept = keep_faces(pair.target, keep_face)
    face_t, bary_t = pair.target_truth
    face_s, _ = pair.source_truth
    covered = keep_face[face_s]
    cut_share = 1.0 - target.area / pair.target.area
    return PartialPair(f"{pair.name}/crop{cut_share:.0%}", pair.source, target, pair.target,
                       (face_t[kept], bary_t[kept]), covered, float(cut_share), pair.source_truth)


def make_partial(kind: str, deformation: str, share: float, *, n_source: int = 2000,
                 n_target: int = 2400, seed: int = 0) -> PartialPair:
    """A ground-truth pair of :func:`groundtruth.make_pair` (random pose) with its target cropped."""
    pair = make_pair(kind, deformation, n_source=n_source, n_target=n_target, seed=seed)
    return crop_pair(pair, share, seed + 7000)


def swap(p: PartialPair) -> PartialPair:
    """The same pair read the other way: the cropped surface is the source (the truth of
    its vertices stays on the whole surface, now the target)."""
    return PartialPair(p.name + "/swapped", p.target, p.source, p.source, p.target_truth,
                       p.covered, p.cut_share)


def partial_error(p: PartialPair, part_to_whole: np.ndarray, whole: sk.Surface) -> np.ndarray:
    """Geodesic error on the whole surface (normalised by its sqrt(area)) of each partial vertex's
    partner; `part_to_whole` (n_part,) maps the cropped surface's vertices."""
    return sk.geodesic_error(whole, part_to_whole, p.target_truth)


def iou(a: np.ndarray, b: np.ndarray) -> float:
    """Intersection over union of two boolean masks."""
    return float(np.sum(a & b) / max(np.sum(a | b), 1))
