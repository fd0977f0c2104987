"""Change analysis and cohort statistics on corresponded surfaces.

For research use only; not for diagnosis or treatment decisions.
"""
from ..correspondence.alignment import (
    Transform,
    rigid_transform,
    similarity_transform,
    weighted_umeyama,
)
from .change import ChangeReport, measure_change
from .completion import Completion, complete
from .labels import transfer_labels
from .metrics import change_metrics
from .shape_model import (
    ProcrustesResult,
    ShapeModel,
    generalized_procrustes,
    shape_model,
    spectral_distances,
)
from .stats import GroupTestResult, vertexwise_group_test
from .workflow import Comparison, compare

__all__ = [
    "ChangeReport",
    "Comparison",
    "Completion",
    "GroupTestResult",
    "ProcrustesResult",
    "ShapeModel",
    "Transform",
    "change_metrics",
    "compare",
    "complete",
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
