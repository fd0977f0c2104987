"""Discrete differential operators on a `Surface` and its Laplace–Beltrami eigenbasis.

Convention: ``L`` is the cotangent *stiffness* matrix, symmetric positive
semi-definite (``x @ L @ x >= 0``), ``M`` the lumped (diagonal) mass matrix.  The
Laplace–Beltrami eigenproblem is ``L φ = λ M φ`` with ``λ >= 0`` in 1/mm².
"""
from __future__ import annotations

import logging
import warnings
from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from .surface import Surface, SurfaceError

log = logging.getLogger("surfacekit")

#: minimum triangle angle (radians) under which the plain cotangent weights are
#: considered unreliable and ``method="auto"`` switches to the robust Laplacian.
NEEDLE_ANGLE = np.deg2rad(0.5)


class EigenSolverWarning(UserWarning):
    """The preferred eigen-solver failed and a fallback was used."""


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
    """Why the plain cotangent Laplacian would be unreliable on `s`, or None."""
    if not s.is_edge_manifold:
        return f"{len(s.non_manifold_edges)} non-manifold edges"
    if np.any(s.face_areas <= 1e-14 * max(s.mean_edge_length, 1e-300) ** 2):
        return "degenerate (zero-area) faces"
    if s.face_angles.min() < NEEDLE_ANGLE:
        return f"needle triangles (minimum angle {np.rad2deg(s.face_angles.min()):.2g} degrees)"
    return None


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
    if method == "auto":
        reason = needs_robust_laplacian(s)
        method = "robust" if reason else "cotangent"
        if reason:
            log.info("laplacian: using the robust intrinsic-Delaunay Laplacian (%s)", reason)
        else:
            log.debug("laplacian: using the cotangent Laplacian")
    key = ("laplacian", method, mass)
    if key in s.cache:
        return s.cache[key]
    if method == "cotangent":
        L = cotangent_laplacian(s.vertices, s.faces)
        M = mass_matrix(s, mass)
    elif method == "robust":
        import robust_laplacian

        L, M = robust_laplacian.mesh_laplacian(
            np.ascontiguousarray(s.vertices), np.ascontiguousarray(s.faces), mollify_factor=1e-5
        )
        L = sp.csr_matrix(L)
        M = sp.diags(M.diagonal())
    else:
        raise ValueError(f"method must be 'auto', 'cotangent' or 'robust', got {method!r}")
    s.cache[key] = (L, M)
    s.cache[("laplacian", "last")] = key
    return L, M


def point_cloud_laplacian(points: np.ndarray, n_neighbors: int = 30):
    """``(L, M)`` for a point cloud via local tufted triangulations (Sharp & Crane 2020)."""
    import robust_laplacian

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


# -------------------------------------------------------------- eigenbasis
@dataclass(frozen=True)
class Eigenbasis:
    """The k smallest Laplace–Beltrami eigenpairs of a surface.

    Attributes
    ----------
    values : (k,) ascending eigenvalues (1/mm²), the first ~0 on a closed surface
    vectors : (n, k) M-orthonormal eigenfunctions (``vectors.T @ M @ vectors = I``)
    mass : (n,) the lumped mass diagonal used (mm²)
    solver : name of the solver that produced them
    notes : plain-word warnings about how they were obtained (solver fallback...)
    """

    values: np.ndarray
    vectors: np.ndarray
    mass: np.ndarray
    solver: str
    notes: tuple[str, ...] = ()

    @property
    def k(self) -> int:
        return int(self.values.shape[0])

    def truncate(self, k: int) -> Eigenbasis:
        if k > self.k:
            raise ValueError(f"basis has {self.k} eigenpairs, {k} requested")
        return Eigenbasis(self.values[:k], self.vectors[:, :k], self.mass, self.solver, self.notes)

    def project(self, f: np.ndarray) -> np.ndarray:
        """Spectral coefficients ``Φᵀ M f`` of per-vertex values, (k,) or (k, c)."""
        return self.vectors.T @ (self.mass[:, None] * f if f.ndim > 1 else self.mass * f)


def _apply_sign_rule(vectors: np.ndarray) -> np.ndarray:
    """Deterministic signs: the entry of largest magnitude of each eigenvector is positive.

    Ties (within 1e-8 relative) go to the lowest vertex index.  The rule follows
    the geometry, so a vertex-permuted copy of a mesh gets matching signs.
    """
    mags = np.abs(vectors)
    top = mags.max(axis=0, keepdims=True)
    idx = np.argmax(mags >= top * (1 - 1e-8), axis=0)
    signs = np.sign(vectors[idx, np.arange(vectors.shape[1])])
    signs[signs == 0] = 1.0
    return vectors * signs


def _shift(L: sp.spmatrix, M: sp.spmatrix) -> float:
    """A small negative shift σ making ``L - σM`` positive definite.

    Scaled by the mean of ``diag(L)/diag(M)`` so that it is tiny relative to the
    spectrum whatever the units (mm or m).
    """
    scale = float(np.mean(L.diagonal() / np.maximum(M.diagonal(), 1e-300)))
    return -1e-6 * max(scale, 1e-300)


def _factor_solve(A: sp.spmatrix):
    """A function solving ``A x = b`` for SPD A, with CHOLMOD (cholespy) or SuperLU."""
    n = A.shape[0]
    try:
        from cholespy import CholeskySolverD, MatrixType

        C = sp.coo_matrix(A)
        chol = CholeskySolverD(
            n, C.row.astype(np.int32), C.col.astype(np.int32), C.data.astype(np.float64), MatrixType.COO
        )

        def solve(b):
            b = np.ascontiguousarray(b, dtype=np.float64)
            x = np.empty_like(b)
            chol.solve(b, x)
            return x

        return solve, "cholmod"
    except ImportError:  # core-only path
        lu = spla.splu(sp.csc_matrix(A), permc_spec="MMD_AT_PLUS_A")
        return lu.solve, "superlu"


def _solve_eigenbasis(L, M, k: int, solver: str) -> tuple[np.ndarray, np.ndarray, str]:
    n = L.shape[0]
    if solver == "dense" or (solver == "auto" and n <= 1200):
        # M is diagonal: the symmetric standard form M^-1/2 L M^-1/2 is cheaper than eigh(L, M)
        d = 1.0 / np.sqrt(M.diagonal())
        w, Y = scipy.linalg.eigh((L.multiply(np.outer(d, d))).toarray(), subset_by_index=[0, k - 1])
        return w, Y * d[:, None], "dense"
    if solver in ("auto", "cholmod", "arpack-lu"):
        sigma = _shift(L, M)
        A = (L - sigma * M).tocsc()
        if solver == "arpack-lu":
            solve = spla.splu(A).solve
            name = "arpack+superlu"
        else:
            solve, name = _factor_solve(A)
            name = f"arpack+{name}"
        op = spla.LinearOperator((n, n), matvec=solve, matmat=solve, dtype=np.float64)
        rng = np.random.default_rng(0)  # deterministic starting vector
        v0 = rng.standard_normal(n)
        try:
            from threadpoolctl import threadpool_limits
        except ImportError:  # core-only environments without threadpoolctl
            from contextlib import nullcontext as threadpool_limits
        try:
            # ARPACK's Lanczos steps are level-2 BLAS on (n, ncv) blocks: threads only add
            # synchronisation there. One BLAS thread was 3x faster at 40k vertices with
            # another process busy on the second core (benchmarks/bench_eigenbasis.py).
            with threadpool_limits(1):
                w, V = _arpack(L, M, k, sigma, op, v0)
            return w, V, name
        except spla.ArpackNoConvergence:
            warnings.warn("eigenbasis: ARPACK did not converge; falling back to LOBPCG",
                          EigenSolverWarning, stacklevel=3)
            solver = "lobpcg-fallback"
    if solver in ("lobpcg", "lobpcg-fallback"):
        return _lobpcg(L, M, k) + (solver,)
    raise ValueError(f"unknown eigen-solver {solver!r}")


def _arpack(L, M, k, sigma, op, v0):
    """ARPACK in shift-invert mode with our factorisation as ``OPinv``.

    tol stays at machine precision: a looser tol (1e-10) let ARPACK stop before the
    last copy of a repeated eigenvalue appeared (test_operators.py).
    """
    return spla.eigsh(L, k=k, M=M, sigma=sigma, OPinv=op, v0=v0, which="LM")


def _lobpcg(L, M, k: int):
    """LOBPCG (Knyazev 2001) with an AMG preconditioner when pyamg is installed."""
    n = L.shape[0]
    sigma = _shift(L, M)
    A = (L - sigma * M).tocsr()
    try:
        import pyamg

        ml = pyamg.smoothed_aggregation_solver(A)
        precond = ml.aspreconditioner()
    except ImportError:
        precond = sp.diags(1.0 / A.diagonal())
    rng = np.random.default_rng(0)
    X = rng.standard_normal((n, k + max(5, k // 5)))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        w, V = spla.lobpcg(A, X, B=M, M=precond, tol=1e-9, maxiter=500, largest=False)
    order = np.argsort(w)[:k]
    return w[order] + sigma, V[:, order]


def _relative_residual(L, mdiag: np.ndarray, w: np.ndarray, V: np.ndarray) -> float:
    """max_i ||L φ_i - λ_i M φ_i|| / ||L|| (Frobenius-free estimate with the diagonal scale)."""
    R = L @ V - (mdiag[:, None] * V) * w[None, :]
    scale = np.abs(L.diagonal()).max() * np.sqrt(np.einsum("ij,ij->j", V, V)).max()
    return float(np.linalg.norm(R, axis=0).max() / max(scale, 1e-300))


def eigenbasis(s: Surface, k: int = 100, *, method: str = "auto", solver: str = "auto",
               mass: str = "barycentric") -> Eigenbasis:
    """The k smallest eigenpairs of ``L φ = λ M φ`` (Laplace–Beltrami), cached on `s`.

    Parameters
    ----------
    s : Surface
    k : int
        Number of eigenpairs (clipped to n - 1).
    method, mass :
        Passed to :func:`laplacian`.
    solver : {"auto", "cholmod", "arpack-lu", "dense", "lobpcg"}
        ``"auto"``: dense for n <= 1200, else ARPACK in shift-invert mode with a
        CHOLMOD sparse Cholesky factorisation of ``L - σM`` (cholespy; SuperLU when
        cholespy is missing).  If ARPACK fails to converge, LOBPCG is used and an
        :class:`EigenSolverWarning` is issued.

    Returns
    -------
    Eigenbasis
        ``values`` (k,) ascending, clipped at 0 (1/mm²); ``vectors`` (n, k)
        M-orthonormal with the sign rule of :func:`_apply_sign_rule`.
    """
    n = s.n_vertices
    k = int(k)
    if k < 1:
        raise ValueError(f"k must be >= 1, got {k}")
    k = min(k, n - 1)
    # reuse a larger cached basis of the same operator
    for key, basis in s.cache.items():
        if key[:1] == ("eigenbasis",) and key[2:] == (method, mass) and basis.k >= k:
            return basis if basis.k == k else basis.truncate(k)
    L, M = laplacian(s, method=method, mass=mass)
    w, V, used = _solve_eigenbasis(L, M, k, solver)
    order = np.argsort(w)
    w, V = w[order], V[:, order]
    if not np.all(np.isfinite(w)) or not np.all(np.isfinite(V)):
        raise SurfaceError("eigen-solver produced non-finite values; check the mesh quality")
    # M-normalise (ARPACK returns M-orthonormal vectors already; dense/LOBPCG too, up to round-off)
    mdiag = M.diagonal()
    V = V / np.sqrt(np.einsum("ij,i,ij->j", V, mdiag, V))[None, :]
    V = _apply_sign_rule(V)
    w = np.maximum(w, 0.0)
    notes = []
    if used == "lobpcg-fallback":
        notes.append("ARPACK did not converge; eigenpairs come from the LOBPCG fallback")
    residual = _relative_residual(L, mdiag, w, V)
    if residual > 1e-6:
        msg = f"eigenpairs inaccurate: largest relative residual {residual:.1e}"
        warnings.warn(f"eigenbasis: {msg}", EigenSolverWarning, stacklevel=2)
        notes.append(msg)
    basis = Eigenbasis(values=w, vectors=V, mass=mdiag, solver=used, notes=tuple(notes))
    for arr in (basis.values, basis.vectors, basis.mass):
        arr.setflags(write=False)
    s.cache[("eigenbasis", k, method, mass)] = basis
    return basis
