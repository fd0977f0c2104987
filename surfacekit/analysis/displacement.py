"""A surface correspondence extended into the volume: a smooth warp and its displacement-field image.

The correspondence pairs each vertex of the *fixed* surface with a point of the
*moving* surface; a displacement field on an image grid must carry those pairs into
the whole volume, exactly on the surface and smoothly elsewhere.  The extension
here is the 3-D biharmonic (polyharmonic) spline, kernel ``φ(r) = r`` plus an
affine part, the minimiser of the bending energy ``∫ |∇²u|²`` among all
interpolants (Duchon, "Splines minimizing rotation-invariant semi-norms in
Sobolev spaces", 1977; used for surface data by Carr et al., "Reconstruction and
representation of 3D objects with radial basis functions", SIGGRAPH 2001; the
thin-plate spline of landmark deformations is its 2-D form, Bookstein, IEEE TPAMI
1989).  Far from the organ it tends to its affine part.

Fitted on every vertex the dense system would hold n² numbers, so the spline is
fitted on a well-spread subset (farthest-point sampling, Gonzalez 1985), and the
small residual left at the other vertices is interpolated by Wendland's compactly
supported C² function ``(1 - r/ρ)⁴₊ (4 r/ρ + 1)``, positive definite in 3-D
(Wendland, Adv. Comput. Math. 1995): a sparse system whose correction vanishes
beyond ρ of the surface.  The sum interpolates every fixed vertex (to solver
precision, far below 1e-6 mm) and is C² everywhere but on the spline centres,
where the biharmonic kernel is C⁰ as always in 3-D.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.linalg
import scipy.sparse as sp
from scipy.spatial import cKDTree
from scipy.spatial.distance import cdist

from ..correspondence.result import Correspondence
from ..correspondence.synchronise import barycentric_coordinates
from ..mesh.linsolve import cholesky_solver
from ..mesh.proximity import closest_on_faces, near_faces
from ..mesh.sampling import farthest_points
from ..mesh.surface import Surface, SurfaceError
from .change import measure_change

#: default number of biharmonic spline centres (a dense (m+4)² system; grid cost ∝ m)
DEFAULT_CENTRES = 500
#: grid points evaluated per block (block x centres float64 distances kept at once)
_BLOCK = 8192


def _wendland(r: np.ndarray, radius: float) -> np.ndarray:
    q = np.clip(r / radius, 0.0, 1.0)
    return (1.0 - q) ** 4 * (4.0 * q + 1.0)


@dataclass
class SurfaceWarp:
    """A smooth displacement ``u(p)`` (mm) with ``u(fixed_i) = moving_i - fixed_i`` exactly.

    Attributes
    ----------
    fixed, moving : (n, 3) RAS mm, the interpolated pairs
    centres : (m,) indices of the fixed points that carry the biharmonic spline
    radius : support (mm) of the Wendland residual correction
    info : fit diagnostics (``max_residual_mm`` at the pairs after the fit)
    """

    fixed: np.ndarray
    moving: np.ndarray
    centres: np.ndarray
    radius: float
    origin: np.ndarray = field(repr=False, default=None)
    spline_weights: np.ndarray = field(repr=False, default=None)
    affine_weights: np.ndarray = field(repr=False, default=None)
    local_weights: np.ndarray = field(repr=False, default=None)
    info: dict = field(default_factory=dict)

    @classmethod
    def fit(cls, fixed: np.ndarray, moving: np.ndarray, *, centres: int = DEFAULT_CENTRES,
            seed: int = 0) -> SurfaceWarp:
        """Fit the warp on (n, 3) paired points (see the module notes for the method)."""
        fixed = np.asarray(fixed, dtype=np.float64)
        moving = np.asarray(moving, dtype=np.float64)
        if fixed.shape != moving.shape or fixed.ndim != 2 or fixed.shape[1] != 3 or len(fixed) < 4:
            raise ValueError(f"need at least 4 point pairs of shape (n, 3), got {fixed.shape} "
                             f"and {moving.shape}")
        if not (np.isfinite(fixed).all() and np.isfinite(moving).all()):
            raise ValueError("point pairs contain NaN or infinite values")
        idx = np.sort(farthest_points(fixed, min(int(centres), len(fixed)), seed=seed))
        origin = fixed.mean(axis=0)
        c = fixed[idx] - origin
        m = len(idx)
        system = np.zeros((m + 4, m + 4))
        system[:m, :m] = cdist(c, c)
        system[:m, m] = system[m, :m] = 1.0
        system[:m, m + 1:] = c
        system[m + 1:, :m] = c.T
        rhs = np.zeros((m + 4, 3))
        rhs[:m] = moving[idx] - fixed[idx]
        sol = scipy.linalg.solve(system, rhs, assume_a="sym")
        warp = cls(fixed, moving, idx, 0.0, origin, sol[:m], sol[m:])
        residual = (moving - fixed) - warp._spline(fixed)
        # support of a few point spacings: about 30 neighbours a row, a well-conditioned system
        spacing = float(np.median(cKDTree(fixed).query(fixed, k=2)[0][:, 1]))
        warp.radius = max(3.0 * spacing, 1e-9)
        warp.local_weights = warp._solve_local(residual)
        worst = np.abs(warp(fixed) - (moving - fixed)).max()
        warp.info = {"centres": m, "pairs": len(fixed), "correction_radius_mm": warp.radius,
                     "max_residual_mm": float(worst)}
        return warp

    def _solve_local(self, residual: np.ndarray) -> np.ndarray:
        tree = cKDTree(self.fixed)
        a = tree.sparse_distance_matrix(tree, self.radius, output_type="coo_matrix")
        # the coo output keeps zero distances, so the diagonal φ(0) = 1 is there
        # symmetric positive definite and sparse: one CHOLMOD factorisation (cholespy) for the
        # three components
        n = len(self.fixed)
        A = sp.coo_matrix((_wendland(a.data, self.radius), (a.row, a.col)), shape=(n, n))
        return cholesky_solver(A)(residual)

    def _spline(self, points: np.ndarray) -> np.ndarray:
        out = np.empty((len(points), 3))
        centres = self.fixed[self.centres] - self.origin
        for start in range(0, len(points), _BLOCK):
            p = points[start:start + _BLOCK] - self.origin
            out[start:start + len(p)] = (cdist(p, centres) @ self.spline_weights
                                         + self.affine_weights[0] + p @ self.affine_weights[1:])
        return out

    def _local(self, points: np.ndarray) -> np.ndarray:
        out = np.zeros((len(points), 3))
        dist, _ = cKDTree(self.fixed).query(points, distance_upper_bound=self.radius)
        near = np.flatnonzero(np.isfinite(dist))
        if len(near):
            a = cKDTree(points[near]).sparse_distance_matrix(
                cKDTree(self.fixed), self.radius, output_type="coo_matrix")
            weights = sp.csr_matrix((_wendland(a.data, self.radius), (a.row, a.col)),
                                    shape=(len(near), len(self.fixed)))
            out[near] = weights @ self.local_weights
        return out

    def __call__(self, points: np.ndarray) -> np.ndarray:
        """(k, 3) displacement (mm, RAS) at (k, 3) RAS points: moving point = p + u(p)."""
        p = np.asarray(points, dtype=np.float64).reshape(-1, 3)
        return self._spline(p) + self._local(p)


# ------------------------------------------------------------------ from a correspondence
def surfaces_of(corr, source, target):
    """(Correspondence, source, target, ChangeReport or None) from a Correspondence plus
    surfaces, or from a Comparison (which carries its surfaces and change report)."""
    if not isinstance(corr, Correspondence) and hasattr(corr, "correspondence"):
        surfaces = getattr(corr, "surfaces", None) or (source, target)
        return corr.correspondence, surfaces[0], surfaces[1], getattr(corr, "change", None)
    if not isinstance(corr, Correspondence):
        raise SurfaceError(f"expected a Correspondence or a Comparison, got {type(corr).__name__}")
    if not (isinstance(source, Surface) and isinstance(target, Surface)):
        raise SurfaceError("a displacement field needs the matched surfaces: pass source= and "
                           "target= (or the Comparison from sk.compare, which carries them)")
    return corr, source, target, None


def correspondence_pairs(corr, source: Surface | None = None, target: Surface | None = None, *,
                         fixed: str = "target") -> tuple[np.ndarray, np.ndarray]:
    """(fixed points, moving points), (k, 3) RAS mm each: the correspondence as point pairs.

    The pairs come from the sub-vertex mapped points of :func:`measure_change`
    (each source vertex's image on the target, smooth and on the target's
    triangles; reused from a Comparison, never recomputed there), in the target's
    own frame (``corr.rigid`` applied).  ``fixed="source"``: each source vertex
    and its image.  ``fixed="target"`` (default): each target vertex and its
    preimage, read off the mapped source triangulation (closest point on the
    mapped triangles around the matched source vertex, Ericson 2005 §5.1.5, and
    the same barycentric point on the source triangle).  Vertices left out by
    the change analysis (near a boundary only one scan has) give no pair.
    """
    corr, source, target, change = surfaces_of(corr, source, target)
    if fixed not in ("source", "target"):
        raise ValueError(f"fixed must be 'source' or 'target', got {fixed!r}")
    if change is None:
        change = measure_change(source, target, corr)
    # mapped points in the target frame: the rigid pose takes the baseline frame back
    mapped = corr.rigid.apply(source.vertices + change.displacement)
    ok = np.isfinite(mapped).all(axis=1)
    if fixed == "source":
        return source.vertices[ok], mapped[ok]
    qi, fi = near_faces(source, corr.target_to_source, rings=2)
    keep = ok[source.faces[fi]].all(axis=1)
    on, face = closest_on_faces(target.vertices, np.where(ok[:, None], mapped, 0.0),
                                source.faces, (qi[keep], fi[keep]))
    has = face >= 0
    tri = source.faces[face[has]]
    bary = barycentric_coordinates(on[has], mapped[tri])
    preimage = np.einsum("ij,ijk->ik", bary, source.vertices[tri])
    return target.vertices[has], preimage


def correspondence_warp(corr, source: Surface | None = None, target: Surface | None = None, *,
                        fixed: str = "target", centres: int = DEFAULT_CENTRES,
                        seed: int = 0) -> SurfaceWarp:
    """The smooth warp of a correspondence: ``p + warp(p)`` is the moving point of fixed point p.

    Pairs from :func:`correspondence_pairs`, extended by :class:`SurfaceWarp`
    (biharmonic spline, Duchon 1977; Carr et al. 2001, plus a Wendland 1995
    correction): exact at every fixed vertex with a pair.  `corr` is a
    Correspondence source -> target (then give `source` and `target`) or the
    Comparison of :func:`surfacekit.compare`.
    """
    fixed_pts, moving_pts = correspondence_pairs(corr, source, target, fixed=fixed)
    return SurfaceWarp.fit(fixed_pts, moving_pts, centres=centres, seed=seed)
