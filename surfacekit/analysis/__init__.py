"""Change analysis and cohort statistics on corresponded surfaces.

For research use only; not for diagnosis or treatment decisions.
"""
from .alignment import Transform, rigid_transform, similarity_transform, weighted_umeyama
from .change import ChangeReport, measure_change
from .labels import transfer_labels
from .shape_model import (
    ProcrustesResult,
    ShapeModel,
    generalized_procrustes,
    shape_model,
    spectral_distances,
)
from .stats import GroupTestResult, benjamini_hochberg, vertexwise_group_test

__all__ = [
    "ChangeReport",
    "GroupTestResult",
    "ProcrustesResult",
    "ShapeModel",
    "Transform",
    "benjamini_hochberg",
    "generalized_procrustes",
    "measure_change",
    "rigid_transform",
    "shape_model",
    "similarity_transform",
    "spectral_distances",
    "transfer_labels",
    "vertexwise_group_test",
    "weighted_umeyama",
]
