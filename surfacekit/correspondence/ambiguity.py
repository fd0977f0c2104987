"""Does the shape itself fix the map?  A probe for near-symmetries left open by the geometry."""
from __future__ import annotations

import numpy as np
from scipy.spatial.transform import Rotation

from . import extrinsic as ex
from . import tuning


class AmbiguousMatchWarning(UserWarning):
    """The shapes leave a rotation of the map undetermined; landmark pairs would fix it."""


def _affine_misfit(moved: np.ndarray, tgt_samples: np.ndarray, tgt_tree, tgt_points: np.ndarray,
                   tgt_normals: np.ndarray) -> float:
    """Mean point-to-plane distance after affine ICP of `moved` onto the target."""
    A, b = ex.affine_icp(moved, tgt_samples, iterations=tuning.PROBE_AFFINE_ITERATIONS)
    return float(np.mean(ex.plane_distances(moved @ A.T + b, tgt_tree, tgt_points, tgt_normals)))


def rotation_ambiguity(moved: np.ndarray, tgt_samples: np.ndarray, tgt_tree, tgt_points: np.ndarray,
                       tgt_normals: np.ndarray, tgt_weights: np.ndarray, *,
                       angle_deg: float = tuning.PROBE_ANGLE_DEG) -> dict:
    """How much worse the best affine fit gets when the chosen pose is turned by ±`angle_deg`.

    The aligned source samples `moved` (p, 3) are rotated about each principal
    axis of the target (through its centroid) by ±angle; each rotated copy is
    fitted to the target again by affine ICP, and its mean point-to-plane misfit
    is compared with that of the unrotated copy.  A ratio near 1 means the shapes give no cue
    against that rotation: a roughly round cross-section, for example, leaves the
    roll about the long axis undetermined, and the map may be turned by such an
    angle.  Landmark pairs fix it.  (Affine fits only: a smooth non-rigid step
    with 24 eigenfunctions absorbs a 30-degree turn of any organ, measured on the
    benchmark organs, and would call everything ambiguous.)

    tgt_samples (q, 3); tgt_tree/tgt_points/tgt_normals/tgt_weights:
    all target vertices (normalised units).  Returns ``{"ratio": min ratio,
    "axis": 0/1/2 (principal axis, largest variance first), "angle_deg",
    "misfit": unrotated misfit, "turn": (3, 3) rotation, "centre": (3,)}`` where
    ``(x - centre) @ turn.T + centre`` is the best turned copy.
    """
    E = ex.principal_frame(tgt_points, tgt_weights)
    c = tgt_weights @ tgt_points / tgt_weights.sum()
    args = (tgt_samples, tgt_tree, tgt_points, tgt_normals)
    base = max(_affine_misfit(moved, *args), 1e-12)
    best = (np.inf, -1, 0.0)
    for axis in range(3):
        for sign in (1.0, -1.0):
            Rr = Rotation.from_rotvec(np.deg2rad(sign * angle_deg) * E[:, axis]).as_matrix()
            ratio = _affine_misfit((moved - c) @ Rr.T + c, *args) / base
            best = min(best, (ratio, axis, sign * angle_deg))
    turn = Rotation.from_rotvec(np.deg2rad(best[2]) * E[:, best[1]]).as_matrix()
    return {"ratio": float(best[0]), "axis": int(best[1]), "angle_deg": float(best[2]), "misfit": base,
            "turn": turn, "centre": c}
