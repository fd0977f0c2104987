"""Small geometric helpers for change analysis: smoothing."""
from __future__ import annotations

import numpy as np

from ..mesh.laplacian import laplacian
from ..mesh.linsolve import cholesky_solver
from ..mesh.surface import Surface


def heat_smooth(s: Surface, values: np.ndarray, sigma: float) -> np.ndarray:
    """Smooth per-vertex values by one implicit heat-diffusion step.

    Solves ``(M + t L) u = M f`` with ``t = σ²/2`` (a Gaussian of standard
    deviation σ mm on a plane has heat time σ²/2; backward Euler, Desbrun et al.
    SIGGRAPH 1999).  Preserves the area-weighted mean.  values : (n,) or (n, c).
    """
    if sigma <= 0:
        return np.array(values, dtype=np.float64, copy=True)
    L, M = laplacian(s)
    key = ("analysis-heat-smooth", float(sigma))
    solve = s.cache.get(key)
    if solve is None:
        # symmetric positive definite: one sparse Cholesky factorisation
        solve = cholesky_solver((M + 0.5 * sigma**2 * L).tocsc())
        s.cache[key] = solve
    f = np.asarray(values, dtype=np.float64)
    mass = M.diagonal()
    if f.ndim == 1:
        return solve(mass * f)
    return solve(mass[:, None] * f)
