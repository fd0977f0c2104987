"""Cohort arrays too large for memory, read a block at a time: Dask arrays (e.g. the rows of a
cohort field store), Zarr arrays or HDF5 datasets, next to ordinary numpy arrays.

The statistics take whichever they are given; a chunked array is read in blocks of
about :data:`BLOCK_BYTES` (whole subjects, or whole columns over all subjects), so
their memory is set by the block size, not by the number of subjects.
"""
from __future__ import annotations

from collections.abc import Iterator

import numpy as np

BLOCK_BYTES = 32 << 20  # bytes of float64 data per block read from a chunked array


def is_chunked(x) -> bool:
    """True for arrays read block by block (they have ``.chunks``; numpy arrays do not)."""
    return hasattr(x, "chunks") and hasattr(x, "shape") and not isinstance(x, np.ndarray)


def loaded(block) -> np.ndarray:
    """A block as a float64 numpy array, computing it when it is a Dask array."""
    if hasattr(block, "compute"):
        block = block.compute()
    return np.asarray(block, dtype=np.float64)


def row_blocks(x, budget: int = BLOCK_BYTES) -> Iterator[tuple[int, np.ndarray]]:
    """(first row, rows) of `x` in blocks of whole rows (subjects) of at most ~`budget` bytes."""
    per_row = 8 * int(np.prod(x.shape[1:], dtype=np.int64))
    step = max(1, int(budget) // max(per_row, 1))
    for start in range(0, int(x.shape[0]), step):
        yield start, loaded(x[start:start + step])


def rows_of(x, budget: int = BLOCK_BYTES) -> Iterator[tuple[int, np.ndarray]]:
    """(index, row) for every row of a numpy or chunked array, reading blocks of rows."""
    if not is_chunked(x):
        for i in range(x.shape[0]):
            yield i, x[i]
        return
    for start, block in row_blocks(x, budget):
        for j, row in enumerate(block):
            yield start + j, row


def column_width(n_rows: int, budget: int = BLOCK_BYTES) -> int:
    """Columns per block so that a block of `n_rows` rows holds ~`budget` bytes of float64."""
    return max(1, int(budget) // (8 * max(int(n_rows), 1)))
