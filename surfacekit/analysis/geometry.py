"""Small geometric helpers for change analysis: neighbourhoods, projection, smoothing."""
from __future__ import annotations

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from ..mesh.surface import Surface


def vertex_adjacency(s: Surface, *, self_loops: bool = True) -> sp.csr_matrix:
    """(n, n) 0/1 vertex adjacency through edges (with the diagonal when `self_loops`)."""
    e = s.edges
    n = s.n_vertices
    a = sp.coo_matrix((np.ones(2 * len(e)), (np.r_[e[:, 0], e[:, 1]], np.r_[e[:, 1], e[:, 0]])),
                      shape=(n, n)).tocsr()
    if self_loops:
        a = a + sp.identity(n, format="csr")
    a.data[:] = 1.0
    return a


def vertex_faces(s: Surface) -> sp.csr_matrix:
    """(n, m) 0/1 vertex-face incidence."""
    f = s.faces
    m = s.n_faces
    return sp.csr_matrix((np.ones(3 * m), (f.ravel(), np.repeat(np.arange(m), 3))),
                         shape=(s.n_vertices, m))


def ring_faces(s: Surface, rings: int) -> sp.csr_matrix:
    """(n, m) 0/1: faces touching the `rings`-ring of each vertex (rings >= 0)."""
    reach = sp.identity(s.n_vertices, format="csr")
    adj = vertex_adjacency(s)
    for _ in range(rings):
        reach = reach @ adj
        reach.data[:] = 1.0
    out = (reach @ vertex_faces(s)).tocsr()
    out.data[:] = 1.0
    return out


def closest_point_on_triangles(p: np.ndarray, a: np.ndarray, b: np.ndarray,
                               c: np.ndarray) -> np.ndarray:
    """Closest point to each p on triangle (a, b, c), all (k, 3); Voronoi-region method.

    Ericson, *Real-Time Collision Detection*, Morgan Kaufmann 2005, §5.1.5,
    vectorised over k point-triangle pairs.  Degenerate triangles fall back to
    their nearest vertex or edge consistently.
    """
    ab, ac, ap = b - a, c - a, p - a
    d1 = np.einsum("ij,ij->i", ab, ap)
    d2 = np.einsum("ij,ij->i", ac, ap)
    bp = p - b
    d3 = np.einsum("ij,ij->i", ab, bp)
    d4 = np.einsum("ij,ij->i", ac, bp)
    cp = p - c
    d5 = np.einsum("ij,ij->i", ab, cp)
    d6 = np.einsum("ij,ij->i", ac, cp)
    va = d3 * d6 - d5 * d4
    vb = d5 * d2 - d1 * d6
    vc = d1 * d4 - d3 * d2
    tiny = 1e-300
    # Interior (default), then overwrite by region in reverse priority order.
    denom = va + vb + vc
    denom = np.where(np.abs(denom) > tiny, denom, tiny)
    v = vb / denom
    w = vc / denom
    q = a + ab * v[:, None] + ac * w[:, None]
    # edge BC
    m_bc = (va <= 0) & ((d4 - d3) >= 0) & ((d5 - d6) >= 0)
    den = (d4 - d3) + (d5 - d6)
    t = np.divide(d4 - d3, den, out=np.zeros_like(den), where=np.abs(den) > tiny)
    q = np.where(m_bc[:, None], b + (c - b) * t[:, None], q)
    # edge AC
    m_ac = (vb <= 0) & (d2 >= 0) & (d6 <= 0)
    den = d2 - d6
    t = np.divide(d2, den, out=np.zeros_like(den), where=np.abs(den) > tiny)
    q = np.where(m_ac[:, None], a + ac * t[:, None], q)
    # edge AB
    m_ab = (vc <= 0) & (d1 >= 0) & (d3 <= 0)
    den = d1 - d3
    t = np.divide(d1, den, out=np.zeros_like(den), where=np.abs(den) > tiny)
    q = np.where(m_ab[:, None], a + ab * t[:, None], q)
    # vertex regions
    q = np.where(((d6 >= 0) & (d5 <= d6))[:, None], c, q)
    q = np.where(((d3 >= 0) & (d4 <= d3))[:, None], b, q)
    q = np.where(((d1 <= 0) & (d2 <= 0))[:, None], a, q)
    return q


def near_faces(s: Surface, seeds: np.ndarray, rings: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """Candidate (query, face) pairs: faces touching the `rings`-ring of each seed vertex.

    Returns query indices (sorted ascending) and face indices, both (p,).
    """
    near = ring_faces(s, rings)[np.asarray(seeds)].tocsr()
    near.sort_indices()
    qi = np.repeat(np.arange(near.shape[0]), np.diff(near.indptr))
    return qi, near.indices.astype(np.int64)


def project_pairs(points: np.ndarray, vertices: np.ndarray, faces: np.ndarray,
                  pairs: tuple[np.ndarray, np.ndarray]) -> np.ndarray:
    """Closest point to each query point among its candidate faces (see `near_faces`), (k, 3)."""
    qi, fi = pairs
    v, f = vertices, faces
    cand = closest_point_on_triangles(points[qi], v[f[fi, 0]], v[f[fi, 1]], v[f[fi, 2]])
    d2 = np.sum((cand - points[qi]) ** 2, axis=1)
    new_query = np.r_[True, qi[1:] != qi[:-1]]
    segment = np.cumsum(new_query) - 1
    is_min = d2 == np.minimum.reduceat(d2, np.flatnonzero(new_query))[segment]
    hit = np.flatnonzero(is_min)
    _, first = np.unique(qi[hit], return_index=True)  # first minimum of each query
    best = hit[first]
    out = np.empty((len(points), 3))
    out[qi[best]] = cand[best]
    return out


def heat_smooth(s: Surface, values: np.ndarray, sigma: float) -> np.ndarray:
    """Smooth per-vertex values by one implicit heat-diffusion step.

    Solves ``(M + t L) u = M f`` with ``t = σ²/2`` (a Gaussian of standard
    deviation σ mm on a plane has heat time σ²/2; backward Euler, Desbrun et al.
    SIGGRAPH 1999).  Preserves the area-weighted mean.  values : (n,) or (n, c).
    """
    if sigma <= 0:
        return np.array(values, dtype=np.float64, copy=True)
    from ..mesh.operators import laplacian

    L, M = laplacian(s)
    key = ("analysis-heat-smooth", float(sigma))
    solve = s.cache.get(key)
    if solve is None:
        solve = spla.factorized((M + 0.5 * sigma**2 * L).tocsc())
        s.cache[key] = solve
    f = np.asarray(values, dtype=np.float64)
    mass = M.diagonal()
    if f.ndim == 1:
        return solve(mass * f)
    return np.column_stack([solve(mass * f[:, j]) for j in range(f.shape[1])])


def face_to_vertex(s: Surface, face_values: np.ndarray) -> np.ndarray:
    """Area-weighted average of per-face values onto vertices, (m,) -> (n,)."""
    f = s.faces
    w = np.repeat(s.face_areas, 3)
    num = np.bincount(f.ravel(), weights=w * np.repeat(face_values, 3), minlength=s.n_vertices)
    den = np.bincount(f.ravel(), weights=w, minlength=s.n_vertices)
    return np.divide(num, den, out=np.zeros_like(num), where=den > 0)


def outward_vertex_normals(s: Surface) -> np.ndarray:
    """(n, 3) unit vertex normals, flipped if the surface is wound inward (negative volume)."""
    n = np.asarray(s.vertex_normals)
    if s.is_closed and s.signed_volume < 0:
        return -n
    return n

