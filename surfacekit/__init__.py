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

# public name -> module that defines it (relative to this package), in pipeline order
_LAZY = {
    # mesh: the surface, its operators, geodesics and descriptors
    "laplacian": "mesh.laplacian", "eigenbasis": "mesh.eigen", "Eigenbasis": "mesh.eigen",
    "gradient": "mesh.laplacian", "divergence": "mesh.laplacian", "mass_matrix": "mesh.laplacian",
    "cotangent_laplacian": "mesh.laplacian", "point_cloud_laplacian": "mesh.laplacian",
    "EigenSolverWarning": "mesh.eigen",
    "heat_kernel_signature": "mesh.descriptors", "scale_invariant_hks": "mesh.descriptors",
    "wave_kernel_signature": "mesh.descriptors", "laplace_spectrum": "mesh.descriptors",
    "spectrum_distance": "mesh.descriptors", "mean_curvature": "mesh.descriptors",
    "gaussian_curvature": "mesh.descriptors",
    "geodesic_distance": "mesh.geodesics", "farthest_point_sampling": "mesh.geodesics",
    "geodesic_distance_matrix": "mesh.geodesics", "geodesic_polar_coordinates": "mesh.geodesics",
    "patch_descriptors": "mesh.geodesics", "GeodesicSolver": "mesh.geodesics",
    # io: file formats
    "load": "io", "save": "io", "load_fields": "io", "save_fields": "io",
    # preparation: segmentation volumes, repair, remeshing, mesh quality
    "from_segmentation": "preparation", "prepare": "preparation",
    "quality_report": "preparation", "QualityReport": "preparation",
    "PrepareReport": "preparation",
    # correspondence
    "match": "correspondence", "Correspondence": "correspondence",
    "MatchOptions": "correspondence", "map_quality": "correspondence",
    "geodesic_error": "correspondence", "AmbiguousMatchWarning": "correspondence",
    "load_landmarks": "correspondence", "save_landmarks": "correspondence",
    "rigid_transform": "correspondence", "similarity_transform": "correspondence",
    # analysis
    "measure_change": "analysis", "ChangeReport": "analysis",
    "compare": "analysis", "Comparison": "analysis",
    "transfer_labels": "analysis", "generalized_procrustes": "analysis",
    "ShapeModel": "analysis", "shape_model": "analysis",
    "vertexwise_group_test": "analysis", "GroupTestResult": "analysis",
    "spectral_distances": "analysis",
    # cohort runs
    "run_cohort": "cohort",
    # application: report
    "write_report": "app.report",
}

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
    "Comparison",
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
    "compare",
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
    "shape_model",
    "similarity_transform",
    "spectral_distances",
    "spectrum_distance",
    "transfer_labels",
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
