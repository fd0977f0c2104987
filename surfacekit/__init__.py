"""surfacekit: analysis of deformable anatomical surfaces.

For research use only; not for diagnosis or treatment decisions.

Public names are imported lazily, so ``import surfacekit`` stays cheap and a user
who needs one stage never pays for the others.
"""
from __future__ import annotations

import importlib
import logging

from .surface import Surface, SurfaceError

__version__ = "0.1.0"

logging.getLogger("surfacekit").addHandler(logging.NullHandler())

# public name -> module that defines it (relative to this package)
_LAZY = {
    # io
    "load": "io", "save": "io", "load_fields": "io", "save_fields": "io",
    "from_segmentation": "segmentation",
    # preparation
    "prepare": "prepare", "quality_report": "prepare", "QualityReport": "prepare",
    "PrepareReport": "prepare",
    # operators
    "laplacian": "operators", "eigenbasis": "operators", "Eigenbasis": "operators",
    "gradient": "operators", "divergence": "operators", "mass_matrix": "operators",
    "cotangent_laplacian": "operators", "point_cloud_laplacian": "operators",
    "EigenSolverWarning": "operators",
    # descriptors
    "heat_kernel_signature": "descriptors", "scale_invariant_hks": "descriptors",
    "wave_kernel_signature": "descriptors", "shape_dna": "descriptors",
    "shape_dna_distance": "descriptors", "mean_curvature": "descriptors",
    "gaussian_curvature": "descriptors",
    # geodesics
    "geodesic_distance": "geodesics", "farthest_point_sampling": "geodesics",
    "geodesic_distance_matrix": "geodesics", "geodesic_polar_coordinates": "geodesics",
    "patch_descriptors": "geodesics", "GeodesicSolver": "geodesics",
    # correspondence
    "match": "correspondence", "Correspondence": "correspondence",
    "MatchOptions": "correspondence", "map_quality": "correspondence",
    "geodesic_error": "correspondence", "AmbiguousMatchWarning": "correspondence",
    "load_landmarks": "correspondence", "save_landmarks": "correspondence",
    # analysis
    "rigid_transform": "analysis", "similarity_transform": "analysis",
    "measure_change": "analysis", "ChangeReport": "analysis",
    "transfer_labels": "analysis", "generalized_procrustes": "analysis",
    "ShapeModel": "analysis", "shape_model": "analysis",
    "vertexwise_group_test": "analysis", "GroupTestResult": "analysis",
    "spectral_distances": "analysis",
    # batch
    "run_cohort": "batch",
    # report
    "write_report": "report",
}

_SUBMODULES = {"synthetic", "io", "operators", "descriptors", "geodesics", "prepare",
               "segmentation", "correspondence", "analysis", "batch", "report", "cli"}

__all__ = [
    "AmbiguousMatchWarning",
    "ChangeReport",
    "Correspondence",
    "EigenSolverWarning",
    "Eigenbasis",
    "GeodesicSolver",
    "GroupTestResult",
    "MatchOptions",
    "PrepareReport",
    "QualityReport",
    "ShapeModel",
    "Surface",
    "SurfaceError",
    "__version__",
    "cotangent_laplacian",
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
    "laplacian",
    "load",
    "load_fields",
    "load_landmarks",
    "map_quality",
    "mass_matrix",
    "match",
    "mean_curvature",
    "measure_change",
    "patch_descriptors",
    "point_cloud_laplacian",
    "prepare",
    "quality_report",
    "rigid_transform",
    "run_cohort",
    "save",
    "save_fields",
    "save_landmarks",
    "scale_invariant_hks",
    "shape_dna",
    "shape_dna_distance",
    "shape_model",
    "similarity_transform",
    "spectral_distances",
    "transfer_labels",
    "vertexwise_group_test",
    "wave_kernel_signature",
    "write_report",
]


def __getattr__(name: str):
    if name in _LAZY:
        module = importlib.import_module(f".{_LAZY[name]}", __name__)
        value = getattr(module, name)
        globals()[name] = value
        # importing submodule `prepare` binds the module to sk.prepare; the function must win
        short = _LAZY[name]
        if _LAZY.get(short) == short and hasattr(module, short):
            globals()[short] = getattr(module, short)
        return value
    if name in _SUBMODULES:
        return importlib.import_module(f".{name}", __name__)
    raise AttributeError(f"module 'surfacekit' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_LAZY) | _SUBMODULES)
