"""Discrete differential operators on a `Surface`: Laplacian, mass, gradient, divergence.

Convention: ``L`` is the cotangent *stiffness* matrix, symmetric positive
semi-definite (``x @ L @ x >= 0``), ``M`` the lumped (diagonal) mass matrix.  The
Laplace–Beltrami eigenproblem ``L φ = λ M φ`` (``λ >= 0`` in 1/mm²) is solved in
:mod:`surfacekit.mesh.eigen`.
"""
from __future__ import annotations

import logging

import numpy as np
import robust_laplacian
import scipy.sparse as sp

from .limits import NEEDLE_ANGLE
from .surface import Surface, SurfaceError

log = logging.getLogger("surfacekit")

LAPLACIAN_METHODS = ("cotangent", "robust")


# ---------------------------------------------------------------- Laplacian
def cotangent_laplacian(vertices: np.ndarray, faces: np.ndarray) -> sp.csr_matrix:
    """Cotangent stiffness matrix (Pinkall & Polthier 1993), symmetric PSD, (n, n).

    ``L_ij = -(cot α_ij + cot β_ij) / 2`` for an edge ij with opposite angles α, β;
    ``L_ii = -Σ_j L_ij``.  Cotangents are computed as ``(a·b)/|a×b|``; corners of
    degenerate (zero-area) faces get weight 0.
    """
    v = np.asarray(vertices, dtype=np.float64)
    f = np.asarray(faces, dtype=np.int64)
    n = v.shape[0]
    rows, cols, vals = [], [], []
    for c in range(3):
        i, j, k = f[:, c], f[:, (c + 1) % 3], f[:, (c + 2) % 3]
        a, b = v[j] - v[i], v[k] - v[i]
        cross = np.linalg.norm(np.cross(a, b), axis=1)
        dot = np.einsum("ij,ij->i", a, b)
        cot = np.divide(dot, cross, out=np.zeros_like(dot), where=cross > 0)
        w = 0.5 * cot  # weight of edge jk, opposite corner i
        rows += [j, k]
        cols += [k, j]
        vals += [-w, -w]
    rows = np.concatenate(rows)
    cols = np.concatenate(cols)
    vals = np.concatenate(vals)
    off = sp.coo_matrix((vals, (rows, cols)), shape=(n, n)).tocsr()
    diag = -np.asarray(off.sum(axis=1)).ravel()
    return (off + sp.diags(diag)).tocsr()


def mass_matrix(s: Surface, kind: str = "barycentric") -> sp.dia_matrix:
    """Lumped mass matrix: barycentric (default) or mixed Voronoi (Meyer et al. 2003) areas."""
    if kind == "barycentric":
        return sp.diags(s.vertex_areas)
    if kind == "voronoi":
        return sp.diags(s.voronoi_areas)
    raise ValueError(f"mass kind must be 'barycentric' or 'voronoi', got {kind!r}")


def needs_robust_laplacian(s: Surface) -> str | None:
    """Why the plain cotangent Laplacian would be unreliable on `s`, or None.

    Non-manifold edges, degenerate faces or needle triangles, with the thresholds
    of :mod:`surfacekit.mesh.limits`.
    """
    if not s.is_edge_manifold:
        return f"{len(s.non_manifold_edges)} non-manifold edges"
    if s.degenerate_faces.any():
        return "degenerate (zero-area) faces"
    if s.face_angles.min() < NEEDLE_ANGLE:
        return f"needle triangles (minimum angle {np.rad2deg(s.face_angles.min()):.2g} degrees)"
    return None


def laplacian_method(s: Surface, method: str = "auto") -> str:
    """The Laplacian :func:`laplacian` builds for `method`, ``"auto"`` resolved (choice logged)."""
    if method != "auto":
        if method not in LAPLACIAN_METHODS:
            raise ValueError(f"method must be 'auto', 'cotangent' or 'robust', got {method!r}")
        return method
    reason = needs_robust_laplacian(s)
    if reason:
        log.info("laplacian: using the robust intrinsic-Delaunay Laplacian (%s)", reason)
        return "robust"
    log.debug("laplacian: using the cotangent Laplacian")
    return "cotangent"


def check_no_unused_vertices(s: Surface) -> None:
    """Raise a SurfaceError naming the count when some vertices are used by no face."""
    unused = s.n_unreferenced_vertices
    if unused:
        what = "1 vertex is" if unused == 1 else f"{unused} vertices are"
        raise SurfaceError(f"{what} used by no face; sk.prepare (or `surfacekit prepare`) drops them")


def laplacian(s: Surface, method: str = "auto", mass: str = "barycentric"):
    """Stiffness and mass matrices ``(L, M)`` of a surface, cached on it.

    Parameters
    ----------
    s : Surface
    method : {"auto", "cotangent", "robust"}
        ``"cotangent"``: the cotangent formula (Pinkall & Polthier 1993).
        ``"robust"``: the intrinsic-Delaunay Laplacian with mollification (Sharp &
        Crane, SGP 2020, through robust-laplacian); its mass is the intrinsic
        barycentric mass.  ``"auto"`` uses the cotangent formula unless the mesh has
        non-manifold edges, degenerate faces or needle triangles, and logs the choice.
    mass : {"barycentric", "voronoi"}
        Lumped mass for the cotangent method.

    Raises
    ------
    SurfaceError
        When some vertices are used by no face: they would have zero mass and make
        every operator built on (L, M) singular (the eigenbasis, the descriptors).

    Returns
    -------
    L : scipy.sparse.csr_matrix, (n, n), symmetric positive semi-definite (1 = dimensionless)
    M : scipy.sparse.dia_matrix, (n, n), diagonal vertex areas (mm²); ``M.diagonal().sum() == s.area``

    Examples
    --------
    >>> import surfacekit as sk
    >>> s = sk.synthetic.icosphere(2)
    >>> L, M = sk.laplacian(s)
    >>> abs(L @ np.ones(s.n_vertices)).max() < 1e-12
    True
    """
    check_no_unused_vertices(s)
    method = laplacian_method(s, method)
    # the robust Laplacian brings its own (intrinsic) mass, so `mass` does not change it
    key = ("laplacian", method, mass if method == "cotangent" else "intrinsic")
    if key in s.cache:
        return s.cache[key]
    if method == "cotangent":
        L = cotangent_laplacian(s.vertices, s.faces)
        M = mass_matrix(s, mass)
    else:
        L, M = robust_laplacian.mesh_laplacian(
            np.ascontiguousarray(s.vertices), np.ascontiguousarray(s.faces), mollify_factor=1e-5
        )
        L = sp.csr_matrix(L)
        M = sp.diags(M.diagonal())
    s.cache[key] = (L, M)
    return L, M


def point_cloud_laplacian(points: np.ndarray, n_neighbors: int = 30):
    """``(L, M)`` for a point cloud via local tufted triangulations (Sharp & Crane 2020)."""
    pts = np.ascontiguousarray(np.asarray(points, dtype=np.float64))
    if pts.ndim != 2 or pts.shape[1] != 3 or len(pts) < 4:
        raise SurfaceError(f"points must have shape (n>=4, 3), got {pts.shape}")
    L, M = robust_laplacian.point_cloud_laplacian(pts, n_neighbors=n_neighbors)
    return sp.csr_matrix(L), sp.diags(M.diagonal())


# ----------------------------------------------------- gradient, divergence
def gradient(s: Surface) -> sp.csr_matrix:
    """Per-face gradient of piecewise-linear vertex functions, (3m, n).

    Row block ``3*t + d`` holds component d of the gradient on face t:
    ``∇u = Σ_i u_i (N × e_i) / (2 A)`` with ``e_i`` the edge opposite vertex i,
    counter-clockwise.  Degenerate faces get a zero gradient.
    """
    v, f = s.vertices, s.faces
    m = s.n_faces
    area2 = 2.0 * s.face_areas
    inv = np.divide(1.0, area2, out=np.zeros_like(area2), where=area2 > 0)
    normal = s.face_normals
    rows, cols, vals = [], [], []
    for c in range(3):
        e = v[f[:, (c + 2) % 3]] - v[f[:, (c + 1) % 3]]  # edge opposite corner c
        g = np.cross(normal, e) * inv[:, None]
        for d in range(3):
            rows.append(3 * np.arange(m) + d)
            cols.append(f[:, c])
            vals.append(g[:, d])
    G = sp.coo_matrix(
        (np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(3 * m, s.n_vertices)
    )
    return G.tocsr()


def divergence(s: Surface) -> sp.csr_matrix:
    """Divergence of per-face vector fields onto vertices, (n, 3m).

    Defined as ``-Gᵀ A`` with A the face areas, so that ``div(grad u) = -L u``
    reproduces the cotangent stiffness matrix (integrated, mm² units).
    """
    G = gradient(s)
    A = sp.diags(np.repeat(s.face_areas, 3))
    return (-(G.T @ A)).tocsr()


# ------------------------------------------------------- faces to vertices
def face_to_vertex_matrix(s: Surface, *, unit_area: bool = False) -> sp.csr_matrix:
    """(n, m) integration of per-face values onto vertices: a third of each face's
    area to each of its corners, the face-to-vertex counterpart of the barycentric
    lumped mass (``face_to_vertex_matrix(s) @ 1 = s.vertex_areas``), mm².

    With `unit_area` the areas are those of the surface scaled to total area 1.
    """
    return s.connectivity.vertex_face_matrix(s.face_areas / (3.0 * s.area if unit_area else 3.0))


def face_to_vertex_mean(s: Surface, face_values: np.ndarray) -> np.ndarray:
    """Area-weighted mean of per-face values (m,) over the faces around each vertex, (n,).

    The row-normalised :func:`face_to_vertex_matrix`; vertices of no face get 0.
    """
    # Weights are the face areas themselves (the factor 1/3 cancels in the mean).
    W = s.connectivity.vertex_face_matrix(s.face_areas)
    num = W @ np.asarray(face_values, dtype=np.float64)
    den = W @ np.ones(s.n_faces)
    return np.divide(num, den, out=np.zeros_like(num), where=den > 0)
