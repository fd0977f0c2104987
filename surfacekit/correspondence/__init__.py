"""Dense correspondence between surfaces: functional maps, ZoomOut, extrinsic cues, the poses
found (rigid, similarity, affine, smooth deformation), map quality.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

from .alignment import Transform, rigid_transform, similarity_transform
from .ambiguity import AmbiguousMatchWarning
from .mismatch import NoMatchWarning
from .options import MatchOptions
from .result import Correspondence, load_landmarks, save_landmarks
from .solver import match

__all__ = ["AmbiguousMatchWarning", "Correspondence", "MatchOptions", "NoMatchWarning", "Transform",
           "geodesic_error", "load_landmarks", "map_quality", "match", "rigid_transform",
           "save_landmarks", "similarity_transform"]


def __getattr__(name: str):
    # quality measures pull in the geodesic solver; import them on first use
    if name in ("map_quality", "geodesic_error"):
        from . import evaluation

        return getattr(evaluation, name)
    raise AttributeError(f"module 'surfacekit.correspondence' has no attribute {name!r}")
