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

from ..mesh.eigen import eigenbasis
from ..mesh.surface import Surface
from . import tuning
from .ambiguity import AmbiguousMatchWarning
from .mismatch import partial_check
from .partial_fit import covered_by, fit_misfit, place_part, rerank, rms_radius
from .partial_fmap import overlap_fmap, slanted_slope, soft_indicator

#: a boundary loop is a cut when its RMS distance from its best-fitting plane is below this
#: share of its RMS radius (a plane cut through a triangulation: 0.01-0.05 on the benchmark
#: crops; a ragged hole in a bad mesh is far from planar)
PLANAR_LOOP = 0.15
#: ... and its RMS radius is at least this share of the surface's RMS radius (a small hole is
#: a defect to fill, not a crop)
LOOP_SIZE = 0.15
#: a rival whose misfit is within this factor of the chosen pose's makes the map ambiguous:
#: measured 1.03 for a flipped cropped ventricle, 1.13-1.9 for correctly placed kidney and
#: liver crops (the whole-to-whole solver's RIVAL_WITHIN is 1.05)
RIVAL_WITHIN = 1.05
#: ... and, for poses compared after the smooth deformation (:func:`~.partial_fit.rerank`),
#: within this factor: measured 1.14 for a cropped ventricle under anisotropic growth whose
#: flipped pose fits almost as well, 1.35 and more for the kidney, liver and hippocampus crops
RIVAL_DEFORMED_WITHIN = 1.25
MODES = ("auto", "yes", "no")


def loop_shape(s: Surface, loop: np.ndarray) -> tuple[float, float]:
    """(RMS distance from the best plane / RMS radius, RMS radius in mm) of a boundary loop."""
    q = s.vertices[loop] - s.vertices[loop].mean(axis=0)
    sv = np.linalg.svd(q, compute_uv=False) / np.sqrt(len(loop))
    radius = float(np.hypot(sv[0], sv[1]))
    return float(sv[2] / max(radius, 1e-300)), radius


def cut_loops(s: Surface) -> list[dict]:
    """Each boundary loop of `s`: vertex count, planarity, radius (mm), and whether it looks like a cut."""
    size = rms_radius(s)
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
    placed = rerank(part, placed, opts, seed)
    misfit, moved = (placed["misfit"], placed["moved"]) if "moved" in placed else \
        fit_misfit(part, placed, opts, seed)
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
                     "match_check": partial_check(misfit, found["area_ratio"]),
                     "rotation_ambiguity": _ambiguity(placed["rival"], len(pairs),
                                                      placed.get("reranked", False))}}


def _ambiguity(rival: dict | None, n_landmarks: int, deformed: bool = False) -> dict | None:
    """The turn verdict of the partial route (keys as the whole-to-whole probe's), with an
    :class:`AmbiguousMatchWarning` when a pose turned by more than RIVAL_ANGLE_DEG fits
    within RIVAL_WITHIN of the chosen one (RIVAL_DEFORMED_WITHIN when the poses were compared
    after the smooth deformation); None with three or more landmark pairs."""
    if n_landmarks >= 3:
        return None
    within = RIVAL_DEFORMED_WITHIN if deformed else RIVAL_WITHIN
    flip = rival is not None and rival["energy_ratio"] < within
    if flip:
        warnings.warn(
            f"a placement of the part turned by {rival['angle_deg']:.0f} degrees fits almost as "
            f"well (misfit ratio {rival['energy_ratio']:.3f}, below {within}): the map may "
            "be turned; give three landmark pairs (MatchOptions.landmarks, or --landmarks on the "
            "command line) to fix it", AmbiguousMatchWarning, stacklevel=4)
    return {"ambiguous": bool(flip), "flip": bool(flip), "rival": rival, "axis": 0,
            "ratio": rival["energy_ratio"] if rival else None, "turns": 0}
