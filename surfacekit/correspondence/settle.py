"""After the energy has picked a winner: turn it while a turned pose fits clearly better, and
judge whether the shapes fix its rotation at all (rival finalists, the rotation probe)."""
from __future__ import annotations

import warnings

import numpy as np

from . import extrinsic as ex
from . import tuning
from .ambiguity import AmbiguousMatchWarning, rotation_ambiguity
from .candidates import Candidate, deform_sizes, deformed_start, refine
from .options import MatchOptions
from .shapes import ShapeState


def probe(src: ShapeState, tgt: ShapeState, cand: Candidate) -> dict:
    """The rotation probe (:func:`rotation_ambiguity`) of a candidate's rigid pose."""
    return rotation_ambiguity(cand.pose.apply(src.sp), tgt.sp, tgt.tree, tgt.points,
                              tgt.surface.vertex_normals, tgt.weights)


def rival(candidates: list[Candidate], energies: list[float], best: int) -> dict | None:
    """The best other finalist whose pose differs from the winner's by more than
    ``tuning.DISTINCT_POSE_DEG``: its energy relative to the winner's, and the angle between the poses."""
    out = None
    for i, (c, e) in enumerate(zip(candidates, energies)):
        angle = float(np.degrees(ex.rotation_angle(c.pose.rotation @ candidates[best].pose.rotation.T)))
        ratio = e / max(energies[best], 1e-300)
        if i != best and angle > tuning.DISTINCT_POSE_DEG and (out is None or ratio < out["energy_ratio"]):
            out = {"energy_ratio": float(ratio), "angle_deg": angle}
    return out


def deformation_floor(src: ShapeState, tgt: ShapeState, cand: Candidate, opts: MatchOptions) -> float:
    """Mean point-to-plane misfit reached by a smooth point-to-point non-rigid ICP from the
    candidate's affine pose: the scale of misfit that the deformation model leaves.

    (Point-to-point on purpose: its pull towards sample positions keeps this floor
    at the sampling's own misfit, which is what the turn gate compares against; the
    thresholds were measured with it.)
    """
    moved = cand.affine_points(src.sp)
    if opts.deform_k > 0:
        D = ex.spectral_nonrigid_icp(moved, src.sphi, src.values, tgt.sp, sizes=deform_sizes(opts))
        moved = moved + src.sphi[:, :len(D)] @ D
    return float(np.mean(tgt.plane_distances(moved)))


def settle(src: ShapeState, tgt: ShapeState, cand: Candidate, opts: MatchOptions, ks_coarse, ks_fine,
           rival_finalist: dict | None = None) -> tuple[Candidate, dict | None]:
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
    likewise if the `rival_finalist` (see :func:`rival`), turned by more than 25 degrees from the
    winner of the candidate energy (typically a 180-degree flip), has an energy
    within `RIVAL_WITHIN` of the winner's (constants in :mod:`.tuning`).
    Either way an :class:`AmbiguousMatchWarning` is issued.  Skipped (None) with
    two or more landmark pairs, which fix any rotation.  Returns
    ``(candidate, verdict)``.
    """
    if len(src.landmarks) >= 2 or not opts.check_ambiguity:
        return cand, None
    found = probe(src, tgt, cand)
    turns = 0
    while (found["ratio"] < tuning.TURN_BELOW and turns < opts.max_turns
           and found["misfit"] > tuning.ROOM_ABOVE * deformation_floor(src, tgt, cand, opts)):
        turned = cand.pose.turned_about(found["turn"], found["centre"])
        cand = deformed_start(src, tgt, cand.route + "+turn", turned, opts)
        cand = refine(src, tgt, refine(src, tgt, cand, ks_coarse, opts), ks_fine, opts)
        found = probe(src, tgt, cand)
        turns += 1
    out = {k: v for k, v in found.items() if k not in ("turn", "centre")}
    out["turns"] = turns
    out["rival"] = rival_finalist
    flip = rival_finalist is not None and rival_finalist["energy_ratio"] < tuning.RIVAL_WITHIN
    out["flip"] = bool(flip)  # a flipped finalist ties with the winner
    out["ambiguous"] = bool(found["ratio"] < tuning.AMBIGUOUS_BELOW or flip)
    _warn(out)
    return cand, out


def _warn(verdict: dict) -> None:
    """Issue the AmbiguousMatchWarning that a settled verdict calls for (stack level of match's caller)."""
    if verdict["flip"]:
        warnings.warn(
            f"an alternative map turned by {verdict['rival']['angle_deg']:.0f} degrees fits almost as well "
            f"(energy ratio {verdict['rival']['energy_ratio']:.3f}, below {tuning.RIVAL_WITHIN}): the map "
            "may be flipped; give two or three landmark pairs (MatchOptions.landmarks, or --landmarks on "
            "the command line) to fix it", AmbiguousMatchWarning, stacklevel=4)
    elif verdict["ambiguous"]:
        names = ("longest", "middle", "shortest")
        warnings.warn(
            f"the shapes hardly constrain a {abs(verdict['angle_deg']):.0f}-degree turn about the target's "
            f"{names[verdict['axis']]} principal axis (misfit ratio {verdict['ratio']:.2f}, below "
            f"{tuning.AMBIGUOUS_BELOW}): the map may be turned about that axis; give two or three "
            "landmark pairs (MatchOptions.landmarks, or --landmarks on the command line) to fix it",
            AmbiguousMatchWarning, stacklevel=4)
