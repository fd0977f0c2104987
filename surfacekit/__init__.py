"""surfacekit: analysis of deformable anatomical surfaces.

For research use only; not for diagnosis or treatment decisions.

Public names are imported lazily, so ``import surfacekit`` stays cheap and a user
who needs one stage never pays for the others.
"""
from __future__ import annotations

import importlib
import logging

from .mesh.surface import Surface, SurfaceError
from .version import __version__

logging.getLogger("surfacekit").addHandler(logging.NullHandler())

# module (relative to this package) -> the public names it defines, in pipeline order
_PUBLIC = {
    "mesh.laplacian": (
        "laplacian", "gradient", "divergence", "mass_matrix", "cotangent_laplacian",
        "point_cloud_laplacian",
    ),
    "mesh.eigen": ("eigenbasis", "Eigenbasis", "EigenSolverWarning"),
    "mesh.descriptors": (
        "heat_kernel_signature", "scale_invariant_hks", "wave_kernel_signature",
        "laplace_spectrum", "spectrum_distance", "mean_curvature", "gaussian_curvature",
    ),
    "mesh.geodesics": (
        "geodesic_distance", "farthest_point_sampling", "geodesic_distance_matrix",
        "geodesic_polar_coordinates", "patch_descriptors", "GeodesicSolver",
    ),
    "io": ("load", "save", "load_fields", "save_fields"),
    "preparation": (
        "from_segmentation", "prepare", "quality_report", "QualityReport", "PrepareReport",
    ),
    "correspondence": (
        "match", "Correspondence", "MatchOptions", "map_quality", "geodesic_error",
        "AmbiguousMatchWarning", "NoMatchWarning", "load_landmarks", "save_landmarks",
        "rigid_transform", "similarity_transform",
    ),
    "analysis": (
        "measure_change", "ChangeReport", "compare", "Comparison", "transfer_labels",
        "generalized_procrustes", "ShapeModel", "shape_model", "vertexwise_group_test",
        "GroupTestResult", "spectral_distances",
    ),
    "analysis.completion": ("complete", "Completion"),
    "analysis.registration": (
        "save_transform", "displacement_field", "transform_points", "apply_transform",
    ),
    "analysis.displacement": ("correspondence_warp",),
    "analysis.longitudinal": ("compare_series", "SeriesComparison"),
    "analysis.rates": ("fit_rates", "change_rate", "series_rates", "RateFit", "SeriesRates"),
    "cohort": ("run_cohort", "CohortFailedError", "UnguardedScriptError", "open_field_store",
               "FieldStore"),
    "app.report": ("write_report",),
}
# public name -> module that defines it
_LAZY = {name: module for module, names in _PUBLIC.items() for name in names}

# stage folders, and the module names earlier releases exposed as ``sk.<name>``
_SUBMODULES = {
    "mesh": "mesh", "io": "io", "preparation": "preparation", "correspondence": "correspondence",
    "analysis": "analysis", "cohort": "cohort", "app": "app",
    "synthetic": "mesh.synthetic", "operators": "mesh.laplacian",
    "descriptors": "mesh.descriptors", "geodesics": "mesh.geodesics",
    "segmentation": "preparation.segmentation", "batch": "cohort", "report": "app.report",
    "cli": "app.cli",
}

__all__ = [
    "AmbiguousMatchWarning",
    "ChangeReport",
    "CohortFailedError",
    "Comparison",
    "Completion",
    "Correspondence",
    "EigenSolverWarning",
    "Eigenbasis",
    "FieldStore",
    "GeodesicSolver",
    "GroupTestResult",
    "MatchOptions",
    "NoMatchWarning",
    "PrepareReport",
    "QualityReport",
    "ShapeModel",
    "Surface",
    "SurfaceError",
    "UnguardedScriptError",
    "__version__",
    "apply_transform",
    "compare",
    "complete",
    "correspondence_warp",
    "cotangent_laplacian",
    "displacement_field",
    "divergence",
    "eigenbasis",
    "farthest_point_sampling",
    "from_segmentation",
    "gaussian_curvature",
    "generalized_procrustes",
    "geodesic_distance",
    "geodesic_distance_matrix",
    "geodesic_error",
    "geodesic_polar_coordinates",
    "gradient",
    "heat_kernel_signature",
    "laplace_spectrum",
    "laplacian",
    "load",
    "load_fields",
    "load_landmarks",
    "map_quality",
    "mass_matrix",
    "match",
    "mean_curvature",
    "measure_change",
    "open_field_store",
    "patch_descriptors",
    "point_cloud_laplacian",
    "prepare",
    "quality_report",
    "rigid_transform",
    "run_cohort",
    "save",
    "save_fields",
    "save_landmarks",
    "save_transform",
    "scale_invariant_hks",
    "shape_model",
    "similarity_transform",
    "spectral_distances",
    "spectrum_distance",
    "transfer_labels",
    "transform_points",
    "vertexwise_group_test",
    "wave_kernel_signature",
    "write_report",
]


def __getattr__(name: str):
    if name in _LAZY:
        value = getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
        globals()[name] = value
        return value
    if name in _SUBMODULES:
        return importlib.import_module(f".{_SUBMODULES[name]}", __name__)
    raise AttributeError(f"module 'surfacekit' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_LAZY) | set(_SUBMODULES))
