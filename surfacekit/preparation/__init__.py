"""The preparation stage: segmentation volumes to surfaces, repair, smoothing, remeshing and
the mesh quality report."""
from .mesh_quality import QualityReport, quality_report
from .pipeline import PrepareReport, prepare
from .segmentation import from_segmentation

__all__ = ["PrepareReport", "QualityReport", "from_segmentation", "prepare", "quality_report"]
