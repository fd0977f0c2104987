"""`match`: dense correspondence by combining extrinsic and intrinsic candidates."""
from __future__ import annotations

import logging
import time

import numpy as np
from threadpoolctl import threadpool_limits

from ..mesh.surface import Surface
from . import tuning
from .candidates import (
    Candidate,
    coarse_poses,
    energy,
    extrinsic_start,
    intrinsic_start,
    refine,
)
from .mismatch import match_check, warn_no_match
from .options import MatchOptions
from .partial import detect_partial, match_partial
from .pose import affine_mm, deformation_mm, rigid_pose, similarity_mm
from .result import Correspondence
from .settle import rival, settle
from .shapes import ShapeState, checked_options, prepare_shape
from .tubes import tube_route
from .zoomout import nearest_rows, nearest_rows_local

log = logging.getLogger("surfacekit")


def zoomout_sizes(opts: MatchOptions) -> tuple[range, list]:
    """Spectral sizes of the coarse ZoomOut steps (up to `opts.zoomout_mid`, where candidates are
    compared and pruned) and of the fine steps (up to `opts.n_eigen`)."""
    k_mid = min(opts.zoomout_mid, opts.n_eigen)
    coarse = range(opts.zoomout_start, k_mid + 1, opts.zoomout_step)
    fine = list(range(k_mid + opts.zoomout_step, opts.n_eigen + 1, opts.zoomout_step)) or [k_mid]
    if fine[-1] != opts.n_eigen and opts.n_eigen > k_mid:
        fine.append(opts.n_eigen)
    return coarse, fine


def start_candidates(src: ShapeState, tgt: ShapeState, opts: MatchOptions, seed: int) -> list[Candidate]:
    """One candidate per distinct coarse pose (extrinsic route) and one from descriptors (intrinsic)."""
    starts = [extrinsic_start(src, tgt, pose, opts) for pose in coarse_poses(src, tgt, opts, seed)]
    if opts.intrinsic_candidate:
        starts.append(intrinsic_start(src, tgt, opts))
    return starts


def extend(src: ShapeState, tgt: ShapeState, cand: Candidate, opts: MatchOptions):
    """Full-resolution point maps ``(t2s, s2t)`` from the candidate's functional map and deformed coordinates."""
    C = cand.fmap
    k = C.shape[0]
    w = opts.coordinate_weight
    moved = cand.deformed_points(src.points, src.phi)
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


def confidence(points: np.ndarray, roundtrip: np.ndarray) -> np.ndarray:
    """exp(-(d/width)²) of the round-trip distance d (unit-size units) per vertex, in [0, 1]."""
    d = np.linalg.norm(points[roundtrip] - points, axis=1)
    return np.exp(-((d / tuning.CONFIDENCE_WIDTH) ** 2))


def search(src: ShapeState, tgt: ShapeState, opts: MatchOptions, seed: int, clock=None) -> tuple:
    """The candidate search: start candidates, coarse ZoomOut, the best `opts.n_finalists` refined
    to full size, the lowest energy wins and is settled (:func:`~.settle.settle`).  Returns
    ``(chosen, found)`` with `found` the JSON-able record of energies and the rotation verdict."""
    lap = clock.lap if clock is not None else (lambda name: None)
    ks_coarse, ks_fine = zoomout_sizes(opts)
    coarse = [refine(src, tgt, c, ks_coarse, opts) for c in start_candidates(src, tgt, opts, seed)]
    coarse_e = [energy(src, tgt, c)["total"] for c in coarse]
    lap("coarse")
    finalists = [refine(src, tgt, coarse[i], ks_fine, opts) for i in np.argsort(coarse_e)[: opts.n_finalists]]
    energies = [energy(src, tgt, c) for c in finalists]
    best = int(np.argmin([e["total"] for e in energies]))
    lap("fine")
    chosen, ambiguity = settle(src, tgt, finalists[best], opts, ks_coarse, ks_fine,
                               rival(finalists, [e["total"] for e in energies], best))
    lap("turn_probe")
    return chosen, {
        "coarse_energies": [float(e) for e in coarse_e],
        "candidates": [{"route": c.route, **e} for c, e in zip(finalists, energies)],
        "chosen": best,
        "rotation_ambiguity": ambiguity,
    }


class _Clock:
    """Seconds spent in each named stage, in order."""

    def __init__(self):
        self.start = self.last = time.perf_counter()
        self.timings: dict[str, float] = {}

    def lap(self, name: str) -> None:
        now = time.perf_counter()
        self.timings[name] = now - self.last
        self.last = now


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
    such a map.  The result is extended to all vertices, and the rigid pose of
    the final map is fitted once, robust to a changing region (:func:`~.pose.rigid_pose`).

    When one surface covers only part of the other (a cropped scan: exactly one
    surface is open along a near-planar cut; ``MatchOptions.partial`` forces this on
    or off), the part is mapped into the whole instead (:mod:`.partial`): every
    vertex of the part gets a partner, and ``source_overlap`` / ``target_overlap``
    mark the region of the whole that the part covers.

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
        functional map (k, k), confidence in [0, 1] per vertex, the transforms
        found (``similarity``, ``affine``, ``deformation``, ``rigid``), the
        ``options`` and ``seed``, and ``info`` with the route chosen, candidate
        energies, the rotation probe and timings (s).
    """
    opts = checked_options(source, target, options)
    clock = _Clock()
    found = detect_partial(source, target, opts.partial)
    if found is not None:  # one surface is a cropped part of the other
        with threadpool_limits(1, user_api="blas"):
            fields = match_partial(source, target, opts, seed, found)
        clock.lap("partial")
        fields["info"].update(timings_s=clock.timings, options=opts.to_dict(), seed=int(seed))
        warn_no_match(fields["info"]["match_check"])
        return Correspondence(**fields, options=opts, seed=int(seed),
                              low_confidence=fields["info"]["match_check"]["low_confidence"])
    with threadpool_limits(1, user_api="blas"):  # small matrices: threads only add contention
        src, tgt = prepare_shape(source, opts, seed, 0), prepare_shape(target, opts, seed + 1, 1)
        clock.lap("prepare")
        chosen, found = search(src, tgt, opts, seed, clock)
        posed = (src, tgt, chosen)  # the states and candidate whose transforms the result reports
        tube = tube_route(src, tgt, chosen, found, opts, seed, search)
        if tube is not None:  # a strongly bent tube, matched after straightening both
            (src, tgt, chosen), posed, found = tube
        clock.lap("tube")
        found["match_check"] = match_check(energy(src, tgt, chosen)["total"], src.values, tgt.values)
        t2s, s2t = extend(src, tgt, chosen, opts)
        # the reported functional map: from the final full-resolution map, M-weighted
        # (C = Φ_tᵀ M_t Π Φ_s, Ovsjanikov et al. 2012), in the unit-area bases
        C = tgt.phi.T @ (tgt.mass[:, None] * src.phi[t2s])
    source_confidence = confidence(src.points, t2s[s2t])
    rigid, rounds = rigid_pose(source, target, s2t, source_confidence)
    clock.lap("rigid_pose")
    clock.timings["total"] = clock.last - clock.start
    info = {
        "route": chosen.route,
        **found,
        "rigid_pose_rounds": rounds,
        "timings_s": clock.timings,
        "options": opts.to_dict(),
        "seed": int(seed),
    }
    warn_no_match(found["match_check"])
    return Correspondence(
        source_to_target=s2t, target_to_source=t2s, functional_map=C,
        confidence=confidence(tgt.points, s2t[t2s]), source_confidence=source_confidence,
        similarity=similarity_mm(posed[0], posed[1], posed[2].pose), affine=affine_mm(*posed),
        deformation=deformation_mm(*posed), rigid=rigid, options=opts, seed=int(seed),
        info=info, low_confidence=found["match_check"]["low_confidence"])
