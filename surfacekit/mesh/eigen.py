"""The Laplace–Beltrami eigenbasis of a `Surface`: the k smallest eigenpairs of ``L φ = λ M φ``.

`eigenbasis` caches its result on the surface under a key holding every
parameter that changes it (k, Laplacian method, mass, solver); the one actual
solve is :func:`solve_eigenbasis`, called exactly once per basis computed.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from threadpoolctl import threadpool_limits

from .eigen_block import BlockSolverNoConvergence, block_eigensolve
from .laplacian import laplacian, laplacian_method
from .linsolve import cholesky_solver
from .surface import Surface, SurfaceError

#: smallest vertex count and number of eigenpairs for which ``solver="auto"`` uses the
#: block Krylov–Schur solver (:mod:`.eigen_block`) instead of ARPACK.  Below either,
#: ARPACK on the same factorisation was as fast (one thread: 0.9x-1.1x at k = 30 up to
#: 40k vertices; the block solver's gain grows with k, 1.4x at 5k and k = 100), and
#: results on such meshes stay bit-for-bit what they were.
BLOCK_MIN_VERTICES = 8000
BLOCK_MIN_K = 40
#: restart cap of the block solver before the ARPACK fallback
BLOCK_MAX_RESTARTS = 40


class EigenSolverWarning(UserWarning):
    """The preferred eigen-solver failed and a fallback was used."""


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


def eigen_shift(L: sp.spmatrix, M: sp.spmatrix, cap: float = 1e-3) -> float:
    """A small negative shift σ making ``L - σM`` positive definite, tiny beside λ₁.

    ``|σ| = min(1e-6 · mean(diag(L)/diag(M)), cap · 4π/A)`` with A the total area
    (the trace of M).  The first term is the rule used so far: on well-shaped
    meshes the mean ratio is about 1.5-3x its value on an equilateral
    triangulation, ``2√3 n/A``, an estimate of the top of the spectrum, so the
    factorised matrix stays well conditioned.  Vertices of near-zero mass
    (needle triangles) blow that mean up by orders of magnitude, so it is capped
    by the scale of the low eigenvalues: Weyl's law ``λ_j ≈ 4πj/A`` (Weyl 1911;
    Chavel, "Eigenvalues in Riemannian Geometry", 1984, ch. I) makes ``4π/A`` the
    order of λ₁ (exactly half of it on a round sphere, where ``λ₁ = 2/r² = 8π/A``,
    the largest λ₁ of any genus-0 surface of that area: Hersch 1970).  Only the
    total area enters the cap, so no distribution of vertex masses can move it.
    Area alone gives no lower bound on λ₁ (a long tube or a thin neck lowers it,
    Cheeger 1970): on the whole large intestine, λ₁ ≈ 0.07 · 4π/A, the cap is
    1.5% of λ₁; shift-invert converges as long as ``|σ|`` is small beside the
    wanted eigenvalues, whose convergence factors ``(λ_j - σ)/(λ_{k+1} - σ)``
    it barely changes.  Scale-free: the same in mm or m.
    """
    mass = M.diagonal()
    mean_ratio = float(np.mean(L.diagonal() / np.maximum(mass, 1e-300)))
    weyl_scale = 4.0 * np.pi / max(float(mass.sum()), 1e-300)
    return -max(min(1e-6 * mean_ratio, cap * weyl_scale), 1e-300)


def solve_eigenbasis(L: sp.spmatrix, M: sp.spmatrix, k: int, solver: str
                     ) -> tuple[np.ndarray, np.ndarray, str]:
    """One eigen-solve: the k smallest ``(values (k,), vectors (n, k), solver used)`` of
    ``L φ = λ M φ`` for a diagonal M, unsorted and unnormalised (see :func:`eigenbasis`).

    The rule for ``solver="auto"``: dense LAPACK for n <= 1200; ARPACK on a CHOLMOD
    factorisation of ``L − σM`` for n < :data:`BLOCK_MIN_VERTICES` (8000) or
    k < :data:`BLOCK_MIN_K` (40); otherwise the block Krylov–Schur solver on the same
    factorisation (``"block"``), and if it misses its tolerance within its restart cap,
    ARPACK with an :class:`EigenSolverWarning`.
    """
    n = L.shape[0]
    if solver == "dense" or (solver == "auto" and n <= 1200):
        # M is diagonal: the symmetric standard form M^-1/2 L M^-1/2 is cheaper than eigh(L, M)
        d = 1.0 / np.sqrt(M.diagonal())
        w, Y = scipy.linalg.eigh((L.multiply(np.outer(d, d))).toarray(), subset_by_index=[0, k - 1])
        return w, Y * d[:, None], "dense"
    large = n >= BLOCK_MIN_VERTICES and k >= BLOCK_MIN_K
    if solver == "block" or (solver == "auto" and large):
        sigma = eigen_shift(L, M)
        solve = cholesky_solver((L - sigma * M).tocsc())
        try:
            # one BLAS thread: the block products are memory-bound, and two threads
            # on a loaded 2-core machine made them 10x slower (bench_eigenbasis.py)
            with threadpool_limits(1):
                w, V = block_eigensolve(L, M.diagonal(), k, sigma, solve,
                                        max_restarts=BLOCK_MAX_RESTARTS)
            return w, V, "block+cholmod"
        except BlockSolverNoConvergence:
            warnings.warn("eigenbasis: the block solver did not converge; falling back to ARPACK",
                          EigenSolverWarning, stacklevel=3)
            return _arpack_cholmod(L, M, k, sigma, solve) + ("arpack-fallback",)
    if solver in ("auto", "cholmod", "arpack-lu"):
        sigma = eigen_shift(L, M)
        A = (L - sigma * M).tocsc()
        if solver == "arpack-lu":
            solve, name = spla.splu(A).solve, "arpack+superlu"
        else:
            solve, name = cholesky_solver(A), "arpack+cholmod"
        try:
            return _arpack_cholmod(L, M, k, sigma, solve) + (name,)
        except spla.ArpackNoConvergence:
            warnings.warn("eigenbasis: ARPACK did not converge; falling back to LOBPCG",
                          EigenSolverWarning, stacklevel=3)
            solver = "lobpcg-fallback"
    if solver in ("lobpcg", "lobpcg-fallback"):
        return _lobpcg(L, M, k) + (solver,)
    raise ValueError(f"unknown eigen-solver {solver!r}")


def _arpack_cholmod(L, M, k, sigma, solve):
    """ARPACK in shift-invert mode on a given solve of ``(L − σM) x = b``, from a fixed start."""
    n = L.shape[0]
    op = spla.LinearOperator((n, n), matvec=solve, matmat=solve, dtype=np.float64)
    rng = np.random.default_rng(0)  # deterministic starting vector
    v0 = rng.standard_normal(n)
    # ARPACK's Lanczos steps are level-2 BLAS on (n, ncv) blocks: threads only add
    # synchronisation there. One BLAS thread was 3x faster at 40k vertices with
    # another process busy on the second core (benchmarks/bench_eigenbasis.py).
    with threadpool_limits(1):
        return _arpack(L, M, k, sigma, op, v0)


def _arpack(L, M, k, sigma, op, v0):
    """ARPACK in shift-invert mode with our factorisation as ``OPinv``.

    tol stays at machine precision: a looser tol (1e-10) let ARPACK stop before the
    last copy of a repeated eigenvalue appeared (test_operators.py).
    """
    return spla.eigsh(L, k=k, M=M, sigma=sigma, OPinv=op, v0=v0, which="LM")


def _lobpcg(L, M, k: int):
    """LOBPCG (Knyazev 2001) with an AMG preconditioner when the optional pyamg is installed."""
    n = L.shape[0]
    sigma = eigen_shift(L, M)
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
    solver : {"auto", "block", "cholmod", "arpack-lu", "dense", "lobpcg"}
        ``"auto"``: dense for n <= 1200; ARPACK in shift-invert mode with a CHOLMOD
        sparse Cholesky factorisation of ``L - σM`` (cholespy) for n below
        :data:`BLOCK_MIN_VERTICES` (8000) or k below :data:`BLOCK_MIN_K` (40); otherwise
        the block Krylov–Schur solver of :mod:`.eigen_block` on the same factorisation
        (``"block"``), with every residual ``‖Lφ − λMφ‖ <= 1e-6 λ_max ‖Mφ‖``; if it
        does not converge within its restart cap, ARPACK is used, an
        :class:`EigenSolverWarning` issued and a note kept.  ``"cholmod"`` is ARPACK on CHOLMOD at any size,
        ``"arpack-lu"`` factorises with SuperLU instead.  If ARPACK fails to
        converge, LOBPCG is used, with the same warning.  The solver is part of
        the cache key: each solver's basis is computed and kept separately.

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
    method = laplacian_method(s, method)
    # every parameter that changes the result is in the key; a larger basis of the
    # same operator from the same solver serves a smaller k
    setting = (method, mass, solver)
    for key, basis in s.cache.items():
        if key[:1] == ("eigenbasis",) and key[2:] == setting and basis.k >= k:
            return basis if basis.k == k else basis.truncate(k)
    L, M = laplacian(s, method=method, mass=mass)
    w, V, used = solve_eigenbasis(L, M, k, solver)
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
    if used == "arpack-fallback":
        notes.append("the block solver did not converge; eigenpairs come from the ARPACK fallback")
    residual = _relative_residual(L, mdiag, w, V)
    if residual > 1e-6:
        msg = f"eigenpairs inaccurate: largest relative residual {residual:.1e}"
        warnings.warn(f"eigenbasis: {msg}", EigenSolverWarning, stacklevel=2)
        notes.append(msg)
    basis = Eigenbasis(values=w, vectors=V, mass=mdiag, solver=used, notes=tuple(notes))
    for arr in (basis.values, basis.vectors, basis.mass):
        arr.setflags(write=False)
    s.cache[("eigenbasis", k) + setting] = basis
    return basis
