"""The mesh stage: the ``Surface``, its connectivity and geometry, the cotangent Laplacian and
eigenbasis, geodesics, curvature, descriptors and geodesic polar patches.

Everything else in surfacekit builds on this stage; it imports no other stage.
"""
from .surface import Surface, SurfaceError

__all__ = ["Surface", "SurfaceError"]
