"""One sparse symmetric positive definite solve, shared by the eigen-solver, smoothing and fields."""
from __future__ import annotations

from collections.abc import Callable

import numpy as np
import scipy.sparse as sp
from cholespy import CholeskySolverD, MatrixType


def cholesky_solver(A: sp.spmatrix) -> Callable[[np.ndarray], np.ndarray]:
    """A function solving ``A x = b`` for a sparse symmetric positive definite A.

    One CHOLMOD factorisation (cholespy, fill-reducing ordering); the returned
    function takes b of shape (n,) or (n, c) and solves all columns in one call.
    Its memory is that of the Cholesky factor, about half an LU factorisation of
    the same matrix.
    """
    C = sp.coo_matrix(A)
    chol = CholeskySolverD(
        A.shape[0], C.row.astype(np.int32), C.col.astype(np.int32), C.data.astype(np.float64),
        MatrixType.COO
    )

    def solve(b):
        b = np.ascontiguousarray(b, dtype=np.float64)
        x = np.empty_like(b)
        chol.solve(b, x)
        return x

    return solve
