"""A block Krylov–Schur eigen-solver for ``L φ = λ M φ`` on one sparse Cholesky factorisation.

The k smallest eigenpairs of the Laplace–Beltrami problem are the k largest of the
shift-inverted operator ``S = (L − σM)⁻¹ M``, which is self-adjoint in the M inner
product.  ARPACK (Lehoucq, Sorensen & Yang, "ARPACK Users' Guide", SIAM 1998) builds
a Krylov space of S one vector at a time and re-orthogonalises each new vector
against all earlier ones with matrix-vector products (level-2 BLAS); at 40k
vertices and k = 100 that bookkeeping, not the solves, is most of its time.  This
module builds the Krylov space a block of b vectors at a time (block Krylov:
Golub & Underwood 1977) and restarts it with the Krylov–Schur method (Stewart,
"A Krylov–Schur algorithm for large eigenproblems", SIAM J. Matrix Anal. Appl. 23,
2001; its block form: Zhou & Saad, "Block Krylov–Schur method for large symmetric
eigenvalue problems", Numer. Algorithms 47, 2008), so that every orthogonalisation
is a product of an (n × J) basis with an (n × b) block: level-3 BLAS.

A block of b ≥ 6 vectors also finds exactly repeated eigenvalues: a Krylov space
started from b vectors holds at most b independent vectors of one eigenspace, and
the exact multiplicities that a mesh's symmetry can force are the dimensions of
the irreducible representations of a finite subgroup of O(3), at most 5 (the
icosahedral group; Altmann & Herzig, "Point-Group Theory Tables", 1994).

Convergence is tested on the quantity the caller asks for: every returned pair has
``‖Lφ − λMφ‖ ≤ tol · λ_max · ‖Mφ‖`` with λ_max the largest of the k.  The residual
comes from the Krylov–Schur relation (see :func:`_residual_norms`), exact up to the
rounding of the factorised solves; ``tests/test_eigen_fast.py`` and
``benchmarks/bench_eigenbasis.py`` check it on the assembled vectors.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg
import scipy.sparse as sp
from scipy.sparse.csgraph import connected_components


class BlockSolverNoConvergence(RuntimeError):
    """The block solver reached its restart cap before every pair met the tolerance."""


#: the parts of a block solve whose time :class:`BlockProfile` records
PARTS = ("solves", "orthogonalisation", "rayleigh_ritz", "residuals")


@dataclass
class BlockProfile:
    """Seconds spent in each part of one block solve, and how much work was done."""

    seconds: dict = field(default_factory=lambda: dict.fromkeys(PARTS, 0.0))
    n_solves: int = 0
    restarts: int = 0
    full_passes: int = 0


def _m_orthonormalise(W: np.ndarray, m: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``W = R^T Q`` with the rows of Q M-orthonormal (Cholesky QR, twice; rows are vectors).

    Returns ``(None, None)`` when the block's Gram matrix is numerically singular.
    """
    R = np.eye(W.shape[0])
    for _ in range(2):
        G = (W * m) @ W.T
        try:
            C = scipy.linalg.cholesky(G, lower=False)
        except np.linalg.LinAlgError:
            return None, None
        if np.min(np.abs(np.diag(C))) < 1e-10 * np.max(np.abs(np.diag(C))):
            return None, None
        Ci = scipy.linalg.solve_triangular(C, np.eye(len(C)), lower=False)
        W = Ci.T @ W
        R = C @ R
    return W, R


class _Basis:
    """An M-orthonormal Krylov basis (rows are vectors) and its projected operator T."""

    def __init__(self, n: int, jmax: int, b: int, m: np.ndarray, rng, k: int):
        self.B = np.empty((jmax, n))
        self.T = np.zeros((jmax, jmax))
        self.J = 0
        self.b = b
        self.k = k
        self.keep = 0
        self.m = m
        self.rng = rng
        self.passes = 0

    def orthogonalise(self, W: np.ndarray, J: int, lo: int = 0) -> tuple[np.ndarray, np.ndarray]:
        """Block classical Gram–Schmidt of W against the first J rows: W − Cᵀ B, C = B M Wᵀ.

        In exact arithmetic W = S·(last block) has components only on rows lo:J (the
        block three-term recurrence of symmetric block Lanczos), so those are removed
        first; one pass over all J rows then removes what rounding left, and a
        further pass follows only if that one removed a noticeable part
        (Daniel, Gragg, Kaufman & Stewart, Math. Comp. 30, 1976: the 1/√2 test).
        """
        C = np.zeros((J, W.shape[0]))
        if lo > 0:
            W = self._pass(W, C, lo, J)
        before = np.einsum("ij,ij,j->i", W, W, self.m)
        W = self._pass(W, C, 0, J)
        self.passes += 1
        if np.any(np.einsum("ij,ij,j->i", W, W, self.m) < 0.5 * before):  # squared norms
            self.passes += 1
            W = self._pass(W, C, 0, J)
        return W, C

    def _pass(self, W: np.ndarray, C: np.ndarray, a: int, z: int) -> np.ndarray:
        B = self.B[a:z]
        c = B @ (W * self.m).T
        W -= c.T @ B
        C[a:z] += c
        return W

    def append(self, W: np.ndarray, lo: int) -> tuple[np.ndarray, np.ndarray]:
        """Orthogonalise W against the basis, M-orthonormalise it, append; return (C, R)."""
        J = self.J
        W, C = self.orthogonalise(W, J, lo)
        Q, R = _m_orthonormalise(W, self.m)
        if Q is None:  # the block lost rank: left to the caller's fallback (ARPACK)
            raise BlockSolverNoConvergence("block eigen-solver: a Krylov block lost rank")
        self.B[J:J + len(Q)] = Q
        self.J = J + len(Q)
        return C, R


def _expand(basis: _Basis, solve, prof: BlockProfile) -> None:
    """Apply S to the last block of the basis and append the orthonormalised result."""
    b, J = basis.b, basis.J
    j0 = J - b
    t0 = time.perf_counter()
    rhs = np.ascontiguousarray((basis.B[j0:J] * basis.m).T)
    W = np.ascontiguousarray(solve(rhs).T)
    t1 = time.perf_counter()
    # after a restart (j0 == keep) S·block couples to every kept Ritz vector
    C, R = basis.append(W, j0 - b if j0 != basis.keep else 0)
    T = basis.T
    T[:J, j0:J] = C
    T[j0:J, :J] = C.T
    T[J:J + b, j0:J] = R
    T[j0:J, J:J + b] = R.T
    prof.seconds["solves"] += t1 - t0
    prof.seconds["orthogonalisation"] += time.perf_counter() - t1
    prof.n_solves += b


def _ritz(basis: _Basis):
    """Rayleigh–Ritz on the expanded part: Ritz values μ (descending), vectors Y, couplings."""
    Jp = basis.J - basis.b
    T11 = basis.T[:Jp, :Jp]
    mu, Y = scipy.linalg.eigh(0.5 * (T11 + T11.T))
    mu, Y = mu[::-1], Y[:, ::-1]
    return mu, Y, basis.T[Jp:basis.J, :Jp] @ Y


def _restart(basis: _Basis, mu, Y, coupling, keep: int) -> None:
    """Krylov–Schur restart: keep `keep` Ritz vectors and the pending block."""
    Jp, b = basis.J - basis.b, basis.b
    pending = basis.B[Jp:basis.J].copy()
    basis.B[:keep] = Y[:, :keep].T @ basis.B[:Jp]
    basis.B[keep:keep + b] = pending
    T = basis.T
    T[:] = 0.0
    T[:keep, :keep] = np.diag(mu[:keep])
    T[keep:keep + b, :keep] = coupling[:, :keep]
    T[:keep, keep:keep + b] = coupling[:, :keep].T
    basis.J = keep + b
    basis.keep = keep


def _residual_norms(L, sigma, basis: _Basis, mu, coupling, k: int):
    """``‖Lx − θMx‖`` of the first k Ritz pairs of S, and their eigenvalues θ = σ + 1/μ.

    For a Ritz pair of S, ``S x − μx = Qc`` (Q the pending block, c its coupling: the
    Krylov–Schur relation), so ``Lx − θMx = −(L − σM)Qc / μ``: exact up to the
    rounding of the relation and of the solves, from one (n × b) product.
    """
    Jp = basis.J - basis.b
    Q = np.ascontiguousarray(basis.B[Jp:basis.J].T)
    AQ = (L @ Q) - sigma * (basis.m[:, None] * Q)
    G = AQ.T @ AQ
    c = coupling[:, :k]
    res = np.sqrt(np.maximum(np.einsum("ij,ik,kj->j", c, G, c), 0.0)) / np.abs(mu[:k])
    return res, sigma + 1.0 / mu[:k]


def _assemble(basis: _Basis, Y, k: int):
    """The k Ritz vectors (n, k) and ``‖Mx‖`` of each."""
    Jp = basis.J - basis.b
    X = basis.B[:Jp].T @ Y[:, :k]
    return X, np.sqrt(np.einsum("ij,ij,i->j", X, X, basis.m * basis.m))


def _start_basis(basis: _Basis, L: sp.spmatrix, sigma: float):
    """Put the known null space first in the basis, then a random block M-orthogonal to it.

    ``L`` has zero row sums, so the indicator of each connected part of its graph is an
    exact eigenvector with λ = 0; a surface of c parts has c of them.  Placing them
    in the basis as converged Ritz vectors lets the Krylov blocks, which hold at most
    b vectors of one eigenspace, work only on the rest of the spectrum, however many
    parts there are.  When c >= k they are the whole answer: returned, (c, n).
    """
    m, b = basis.m, basis.b
    c, labels = connected_components(abs(L) > 0, directed=False)
    Z = np.zeros((c, len(m)))
    Z[labels, np.arange(len(m))] = 1.0
    Z /= np.sqrt(Z @ m)[:, None]
    if c >= basis.k:
        return Z
    basis.B[:c] = Z
    basis.T[:c, :c] = np.eye(c) / (0.0 - sigma)
    basis.J = basis.keep = c
    basis.append(basis.rng.standard_normal((b, len(m))), 0)
    return None


def block_eigensolve(L: sp.spmatrix, mass: np.ndarray, k: int, sigma: float, solve, *,
                     tol: float = 1e-6, block: int = 8, keep: int | None = None,
                     max_dim: int | None = None, max_restarts: int = 40, near: float = 1e3, seed: int = 0,
                     profile: BlockProfile | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The k smallest eigenpairs of ``L φ = λ M φ`` (M = diag(mass)) by block Krylov–Schur.

    `solve(B)` must return ``(L − σM)⁻¹ B`` for an (n, b) block B.  The basis grows to
    `max_dim` vectors (default keep + 14b) in blocks of `block`; each restart keeps the
    `keep` (default k + 4b) Ritz vectors of largest shift-inverted Ritz value.
    Converged when every one of the k pairs has ``‖Lφ − λMφ‖ ≤ tol · λ_max · ‖Mφ‖``;
    raises :class:`BlockSolverNoConvergence` after `max_restarts` restarts.
    Returns ``(values (k,), vectors (n, k))``, M-orthonormal, ascending.
    Deterministic for a given `seed` (the random starting block).
    """
    prof = profile if profile is not None else BlockProfile()
    n = L.shape[0]
    b = int(block)
    keep = int(keep or k + 4 * b)
    jmax = int(max_dim or keep + 14 * b)
    jmax = min(jmax, n - 1)
    if not (k < keep and keep + 2 * b <= jmax):
        raise ValueError(f"block solver needs k < keep and keep + 2b <= max_dim, got "
                         f"k={k}, keep={keep}, b={b}, max_dim={jmax}")
    m = np.asarray(mass, dtype=np.float64)
    rng = np.random.default_rng(seed)
    basis = _Basis(n, jmax, b, m, rng, k)
    null = _start_basis(basis, L, sigma)
    if null is not None:
        return np.zeros(k), null[:k].T.copy()
    mass_scale = float(np.sqrt(np.sum(m * m) / np.sum(m)))
    restarts, last_est = 0, np.inf
    while restarts <= max_restarts:
        _expand(basis, solve, prof)
        full = basis.J + b > jmax
        # Ritz pairs are checked at the end of each cycle, and after every block once
        # the last check came within `near` of the tolerance
        if basis.J - b < k + b or not (full or last_est <= near * tol):
            continue
        t0 = time.perf_counter()
        mu, Y, coupling = _ritz(basis)
        t1 = time.perf_counter()
        res, theta = _residual_norms(L, sigma, basis, mu, coupling, k)
        # ‖Mx‖ ≈ (Σm²/Σm)^½ for an M-normalised x spread over the surface, exact below
        est = res / (np.max(theta) * mass_scale)
        prof.seconds["residuals"] += time.perf_counter() - t1
        prof.seconds["rayleigh_ritz"] += t1 - t0
        last_est = float(np.max(est))
        if last_est <= 0.5 * tol:
            t2 = time.perf_counter()
            X, mnorm = _assemble(basis, Y, k)
            prof.seconds["residuals"] += time.perf_counter() - t2
            if np.max(res / (np.max(theta) * mnorm)) <= tol:
                prof.restarts = restarts
                prof.full_passes = basis.passes
                return theta, X
        if full:
            t0 = time.perf_counter()
            _restart(basis, mu, Y, coupling, keep)
            prof.seconds["rayleigh_ritz"] += time.perf_counter() - t0
            restarts += 1
    prof.restarts = max_restarts
    raise BlockSolverNoConvergence(
        f"block eigen-solver: not converged to {tol:g} after {max_restarts} restarts")
