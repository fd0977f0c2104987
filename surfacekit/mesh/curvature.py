"""Per-vertex mean and Gaussian curvature of a triangle mesh.

Signs follow the outward normal given by the face winding (right-hand rule):
a sphere of radius r has mean curvature ``+1/r`` and Gaussian curvature ``+1/r²``.
Vertices on a mesh boundary get NaN (neither estimate is defined there).
Public names are re-exported by :mod:`surfacekit.mesh.descriptors`.
"""
from __future__ import annotations

import numpy as np

from .laplacian import laplacian
from .surface import Surface


def _vertex_area(s: Surface, area: str) -> np.ndarray:
    if area == "voronoi":
        return s.voronoi_areas
    if area == "barycentric":
        return s.vertex_areas
    raise ValueError(f"area must be 'voronoi' or 'barycentric', got {area!r}")


def mean_curvature(s: Surface, *, area: str = "voronoi", method: str = "auto") -> np.ndarray:
    """Mean curvature from the Laplacian of the coordinates (Meyer, Desbrun, Schröder
    & Barr, "Discrete differential-geometry operators for triangulated 2-manifolds",
    VisMath 2002/2003).

    The mean-curvature normal satisfies ``Δx = -2 H n``; with the cotangent
    stiffness matrix ``L`` (``L ≈ -M Δ``) this gives
    ``H_i = (L x)_i · n_i / (2 A_i)`` with ``n_i`` the outward vertex normal and
    ``A_i`` the mixed Voronoi area (or barycentric with ``area="barycentric"``).

    Parameters
    ----------
    s : Surface
    area : {"voronoi", "barycentric"} vertex area ``A_i``
    method : Laplacian method passed to :func:`surfacekit.laplacian` (cached)

    Returns
    -------
    (n,) float64 in 1/mm; positive where the surface is convex seen from outside;
    NaN on boundary vertices and on vertices without area.

    Examples
    --------
    >>> import numpy as np
    >>> import surfacekit as sk
    >>> s = sk.synthetic.icosphere(4, radius=2.0)
    >>> bool(abs(np.median(sk.mean_curvature(s)) - 0.5) < 0.01)
    True
    """
    L, _ = laplacian(s, method=method)
    lx = L @ s.vertices
    a = _vertex_area(s, area)
    normal_part = np.einsum("ij,ij->i", lx, s.vertex_normals)
    with np.errstate(divide="ignore", invalid="ignore"):
        h = normal_part / (2.0 * a)
    h[(a <= 0) | s.connectivity.boundary_vertices] = np.nan
    return h


def gaussian_curvature(s: Surface, *, area: str = "voronoi") -> np.ndarray:
    """Gaussian curvature as angle defect over vertex area (Meyer et al. 2003;
    discrete Gauss–Bonnet, do Carmo 1976).

    ``K_i = (2π - Σ_f θ_f(i)) / A_i`` with ``θ_f(i)`` the corner angles at vertex
    i and ``A_i`` the mixed Voronoi area (or barycentric).  Summed with the areas
    it gives exactly ``2π χ`` on a closed mesh.

    Returns
    -------
    (n,) float64 in 1/mm²; NaN on boundary vertices and vertices without area.
    """
    angle_sum = np.bincount(s.faces.ravel(), weights=s.face_angles.ravel(), minlength=s.n_vertices)
    a = _vertex_area(s, area)
    with np.errstate(divide="ignore", invalid="ignore"):
        k = (2.0 * np.pi - angle_sum) / a
    k[(a <= 0) | s.connectivity.boundary_vertices] = np.nan
    return k
