"""Geodesic distances, farthest-point sampling and geodesic polar coordinates.

Distances (heat method) and logarithmic maps (vector heat method) come from
potpourri3d; patch descriptors for all vertices live in :mod:`surfacekit.mesh.patches`
and are re-exported here.  Distances are in the units of the vertices (mm for
medical data).  The heat
method's factorisations are kept in a :class:`GeodesicSolver` cached on the
surface (``s.cache[("heat_solver", t_coef, robust)]``), so repeated calls on the
same surface only pay for back-substitutions.
"""
from __future__ import annotations

import numpy as np

from .patches import patch_descriptors  # noqa: F401  public name of this module
from .sampling import greedy_farthest
from .surface import Surface, SurfaceError


def _as_sources(s: Surface, sources) -> np.ndarray:
    idx = np.atleast_1d(np.asarray(sources))
    if idx.size == 0:
        raise ValueError("sources is empty: give at least one vertex index")
    if idx.dtype.kind not in "iu":
        if idx.dtype.kind == "f" and np.all(idx == np.round(idx)):
            idx = idx.astype(np.int64)
        else:
            raise ValueError(f"sources must be integer vertex indices, got dtype {idx.dtype}")
    idx = idx.astype(np.int64).ravel()
    if idx.min() < 0 or idx.max() >= s.n_vertices:
        raise ValueError(f"source vertex index out of range for {s.n_vertices} vertices: "
                         f"{int(idx.min() if idx.min() < 0 else idx.max())}")
    return np.unique(idx)


class GeodesicSolver:
    """Heat-method distance and vector-heat log map on one surface, factorised once.

    Heat method: Crane, Weischedel & Wardetzky, "Geodesics in heat", ACM TOG 2013;
    vector heat method: Sharp, Soliman & Crane, ACM TOG (SIGGRAPH) 2019; both through
    potpourri3d (geometry-central).  The factorisations are built on first use and
    reused by every later call.

    Parameters
    ----------
    s : Surface
    t_coef : float
        Diffusion time as a multiple of the squared mean edge length (the paper's
        ``t = h²``, ``t_coef = 1``).  Larger is smoother and less accurate.
    robust : bool
        Run the heat method on the intrinsic Delaunay triangulation (Sharp & Crane
        2020), recommended for meshes with poor triangles.

    Examples
    --------
    >>> import surfacekit as sk
    >>> s = sk.synthetic.icosphere(3)
    >>> d = sk.GeodesicSolver.for_surface(s).distance([0])
    >>> d.shape == (s.n_vertices,)
    True
    """

    def __init__(self, s: Surface, *, t_coef: float = 1.0, robust: bool = True):
        if not np.isfinite(t_coef) or t_coef <= 0:
            raise ValueError(f"t_coef must be a positive number, got {t_coef}")
        self.surface = s
        self.t_coef = float(t_coef)
        self.robust = bool(robust)
        self._heat = None
        self._vector_heat = None

    @classmethod
    def for_surface(cls, s: Surface, *, t_coef: float = 1.0, robust: bool = True) -> GeodesicSolver:
        """The solver cached on `s` for these settings (created on first request)."""
        key = ("heat_solver", float(t_coef), bool(robust))
        solver = s.cache.get(key)
        if solver is None:
            solver = cls(s, t_coef=t_coef, robust=robust)
            s.cache[key] = solver
        return solver

    def _arrays(self) -> tuple[np.ndarray, np.ndarray]:
        s = self.surface
        if not s.is_edge_manifold:
            raise SurfaceError(f"geodesics need an edge-manifold mesh; "
                               f"{len(s.non_manifold_edges)} non-manifold edges (run sk.prepare)")
        # potpourri3d drops vertices used by no face: solve on the used ones and map back
        used = np.unique(s.faces)
        local = np.full(s.n_vertices, -1, dtype=np.int64)
        local[used] = np.arange(used.size)
        self._used, self._local = used, local
        return np.ascontiguousarray(s.vertices[used]), np.ascontiguousarray(local[s.faces])

    def _to_local(self, idx: np.ndarray) -> np.ndarray:
        loc = self._local[idx]
        if np.any(loc < 0):
            raise ValueError(f"vertex {int(idx[np.argmax(loc < 0)])} belongs to no face")
        return loc

    def _scatter(self, values: np.ndarray, fill: float) -> np.ndarray:
        out = np.full((self.surface.n_vertices,) + values.shape[1:], fill, dtype=np.float64)
        out[self._used] = values
        return out

    @property
    def heat(self):
        if self._heat is None:
            import potpourri3d as pp3d

            V, F = self._arrays()
            try:
                self._heat = pp3d.MeshHeatMethodDistanceSolver(V, F, t_coef=self.t_coef,
                                                               use_robust=self.robust)
            except (RuntimeError, ValueError) as exc:
                raise SurfaceError(f"heat-method setup failed: {exc}") from None
        return self._heat

    @property
    def vector_heat(self):
        if self._vector_heat is None:
            import potpourri3d as pp3d

            V, F = self._arrays()
            try:
                self._vector_heat = pp3d.MeshVectorHeatSolver(V, F, t_coef=self.t_coef)
            except (RuntimeError, ValueError) as exc:
                raise SurfaceError(f"vector-heat setup failed: {exc}") from None
        return self._vector_heat

    def distance(self, sources) -> np.ndarray:
        """(n,) geodesic distance (vertex units) from the nearest of `sources` (vertex indices);
        ``inf`` on connected components that hold no source."""
        idx = _as_sources(self.surface, sources)
        heat = self.heat
        loc = self._to_local(idx)
        if loc.size == 1:
            d = heat.compute_distance(int(loc[0]))
        else:
            d = heat.compute_distance_multisource([int(i) for i in loc])
        d = self._scatter(np.maximum(np.asarray(d, dtype=np.float64), 0.0), np.inf)
        d[idx] = 0.0
        # the heat method leaves a meaningless constant on components without a source
        d[~self._reachable(idx)] = np.inf
        return d

    def _reachable(self, idx: np.ndarray) -> np.ndarray:
        comp = self.surface.vertex_components
        return np.isin(comp, comp[idx])

    def log_map(self, center: int) -> np.ndarray:
        """(n, 2) logarithmic map about vertex `center` (vertex units), CCW about the outward normal;
        NaN on other connected components.

        Vector heat method (Sharp, Soliman & Crane 2019).  The second coordinate is
        oriented so that the angle ``atan2(y, x)`` increases counter-clockwise seen
        from the side the face normals (right-hand rule on the winding) point to.
        """
        c = int(_as_sources(self.surface, [center])[0])
        vector_heat = self.vector_heat
        log = vector_heat.compute_log_map(int(self._to_local(np.array([c]))[0]))
        log = self._scatter(np.asarray(log, dtype=np.float64), np.nan)
        log[~self._reachable(np.array([c]))] = np.nan
        return log * self._log_map_orientation()

    def _log_map_orientation(self) -> np.ndarray:
        # geometry-central's log map already turns counter-clockwise about the normal of
        # the face winding (measured on a CCW flat disk and an outward sphere; guarded by
        # tests/test_geodesics.py), so no flip is needed.
        return np.array([1.0, 1.0])


def geodesic_distance(s: Surface, sources, *, t_coef: float = 1.0, robust: bool = True) -> np.ndarray:
    """Geodesic distance from a set of source vertices by the heat method.

    Crane, Weischedel & Wardetzky, "Geodesics in heat: a new approach to computing
    distance based on heat flow", ACM Transactions on Graphics 32(5), 2013, through
    potpourri3d.  The factorisation is cached on `s` and reused across calls.

    Parameters
    ----------
    s : Surface
    sources : int or (q,) int
        Source vertex indices; the distance is to the nearest source.
    t_coef, robust :
        See :class:`GeodesicSolver`.

    Returns
    -------
    (n,) float64 distances in the units of the vertices (mm), 0 at the sources and
    ``inf`` on connected components without a source.

    Examples
    --------
    >>> import numpy as np
    >>> import surfacekit as sk
    >>> s = sk.synthetic.icosphere(4)
    >>> d = sk.geodesic_distance(s, 0)
    >>> bool(abs(d.max() - np.pi) < 0.05)   # antipode of a unit sphere
    True
    """
    return GeodesicSolver.for_surface(s, t_coef=t_coef, robust=robust).distance(sources)


def farthest_point_sampling(s: Surface, n: int, seed: int = 0, *, t_coef: float = 1.0,
                            return_distances: bool = False):
    """Geodesic farthest-point sampling (Eldar, Lindenbaum, Porat & Zeevi, IEEE TIP 1997;
    on surfaces, Moenning & Dodgson 2003).

    Starts from a vertex drawn with `seed`, then repeatedly adds the vertex
    farthest (heat-method geodesic distance) from all samples so far.  Each step
    is one back-substitution with the cached factorisation.

    Parameters
    ----------
    s : Surface
    n : number of samples, 1 <= n <= s.n_vertices
    seed : chooses the first sample (deterministic)
    return_distances : also return the (n_vertices,) distance to the nearest sample (mm)

    Returns
    -------
    (n,) int64 vertex indices in selection order (and the distances if asked).
    """
    n = int(n)
    if n < 1 or n > s.n_vertices:
        raise ValueError(f"n must be between 1 and {s.n_vertices}, got {n}")
    solver = GeodesicSolver.for_surface(s, t_coef=t_coef)
    rng = np.random.default_rng(seed)
    used = s.connectivity.used_vertices  # vertices of no face are never sampled
    if n > used.size:
        raise ValueError(f"n must be at most the {used.size} vertices used by faces, got {n}")
    eligible = np.zeros(s.n_vertices, dtype=bool)
    eligible[used] = True
    first = int(used[rng.integers(used.size)])
    samples, nearest = greedy_farthest(first, n, lambda i: solver.distance([i]), eligible)
    return (samples, nearest) if return_distances else samples


def geodesic_distance_matrix(s: Surface, samples, *, t_coef: float = 1.0) -> np.ndarray:
    """(q, q) symmetric geodesic distances (mm) among sample vertices, heat method.

    One solve per sample with the cached factorisation (Crane et al. 2013); the
    heat method is not exactly symmetric, so the matrix is averaged with its
    transpose and its diagonal set to 0.
    """
    idx = np.atleast_1d(np.asarray(samples))
    _as_sources(s, idx)  # validates
    idx = idx.astype(np.int64).ravel()
    solver = GeodesicSolver.for_surface(s, t_coef=t_coef)
    D = np.stack([solver.distance(i)[idx] for i in idx])
    D = 0.5 * (D + D.T)
    np.fill_diagonal(D, 0.0)
    return D


def geodesic_polar_coordinates(s: Surface, center: int, radius: float, *, t_coef: float = 1.0):
    """Geodesic polar coordinates about a vertex by the vector heat method's logarithmic map.

    Sharp, Soliman & Crane, "The vector heat method", ACM Transactions on Graphics
    38(3), 2019, through potpourri3d; the factorisations are cached on `s`.
    ``theta`` runs counter-clockwise about the outward normal defined by the face
    winding (right-hand rule), from the zero direction of the tangent frame at
    `center` (arbitrary but deterministic for a given mesh).

    Parameters
    ----------
    s : Surface
    center : vertex index
    radius : geodesic radius of the patch (mm), > 0

    Returns
    -------
    vertex_indices : (p,) int64, ascending, the vertices with ``r <= radius`` (center included)
    r : (p,) geodesic distance from the center (mm)
    theta : (p,) angle in radians, in (-π, π]; 0 at the center

    Raises
    ------
    ValueError
        When `radius` is below the shortest edge at `center`: the patch would hold
        the centre alone.
    """
    if not np.isfinite(radius) or radius <= 0:
        raise ValueError(f"radius must be a positive number, got {radius}")
    if not 0 <= int(center) < s.n_vertices:
        raise ValueError(f"center {center} is not a vertex index (0..{s.n_vertices - 1})")
    edges = s.edges[(s.edges == int(center)).any(axis=1)]
    if len(edges) == 0:
        raise ValueError(f"center vertex {center} is used by no face")
    local = float(np.linalg.norm(s.vertices[edges[:, 0]] - s.vertices[edges[:, 1]], axis=1).min())
    if radius < local:
        raise ValueError(f"radius {radius:g} mm is below the local edge length at vertex {center} "
                         f"({local:g} mm, its shortest edge): the patch would hold the centre alone")
    log = GeodesicSolver.for_surface(s, t_coef=t_coef).log_map(center)
    r = np.hypot(log[:, 0], log[:, 1])
    idx = np.flatnonzero(r <= radius)
    theta = np.arctan2(log[idx, 1], log[idx, 0])
    theta[r[idx] == 0] = 0.0
    return idx.astype(np.int64), r[idx], theta

