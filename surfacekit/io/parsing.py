"""Helpers shared by the mesh format parsers: polygons, cell lists, numbers, field columns.

Parsers raise ``SurfaceError`` with one-line messages; ``surfacekit.io`` adds the
file name.
"""
from __future__ import annotations

import re

import numpy as np

from ..mesh.surface import SurfaceError

FIELD_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_.\-]*$")
# Decompressed data may exceed the file by this factor (plus a fixed allowance) before
# a GIFTI or NPZ file is refused as a decompression bomb (common practice; deflate
# reaches ~1000:1 on constant data, real meshes ~2-5:1).
MAX_EXPANSION, EXPANSION_ALLOWANCE = 100, 256 << 20


def fan_triangulate(counts: np.ndarray, flat: np.ndarray) -> np.ndarray:
    """Triangulate polygons given as (m,) vertex counts and their concatenated (sum,) indices.

    A polygon (p0, p1, ..., pk) becomes the fan (p0, p1, p2), (p0, p2, p3), ...
    (common practice for convex, planar polygons).  Returns (t, 3) int64.
    """
    counts = np.asarray(counts, dtype=np.int64)
    flat = np.asarray(flat, dtype=np.int64)
    if counts.size == 0:
        return np.empty((0, 3), dtype=np.int64)
    if counts.min() < 3:
        raise SurfaceError(f"polygon with {int(counts.min())} vertices (need at least 3)")
    if counts.sum() != flat.size:
        raise SurfaceError("polygon vertex counts do not match the index list")
    starts = np.cumsum(counts) - counts
    n_tri = counts - 2
    owner = np.repeat(np.arange(counts.size), n_tri)
    k = np.arange(int(n_tri.sum())) - np.repeat(np.cumsum(n_tri) - n_tri, n_tri)
    s = starts[owner]
    return np.stack([flat[s], flat[s + k + 1], flat[s + k + 2]], axis=1)


def split_cells(data: np.ndarray, n_cells: int) -> tuple[np.ndarray, np.ndarray]:
    """Split ``[c0, i.., c1, i.., ...]`` into (counts, flat indices) for `n_cells` cells.

    Fast path when every cell has the first cell's size; otherwise a walk that is
    bounded by ``len(data)`` (each cell consumes at least one value).
    """
    data = np.asarray(data, dtype=np.int64)
    if n_cells == 0:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    if data.size == 0:
        raise SurfaceError(f"{n_cells} cells declared but no cell data")
    c = int(data[0])
    if c >= 0 and data.size == n_cells * (c + 1):
        rows = data.reshape(n_cells, c + 1)
        if np.all(rows[:, 0] == c):
            return rows[:, 0].copy(), rows[:, 1:].ravel()
    counts = np.empty(n_cells, dtype=np.int64)
    keep = np.zeros(data.size, dtype=bool)
    pos = 0
    for i in range(n_cells):  # irregular cells only; bounded by the data size
        if pos >= data.size:
            raise SurfaceError(f"cell list ends after {i} of {n_cells} cells")
        c = int(data[pos])
        if c < 0 or pos + 1 + c > data.size:
            raise SurfaceError(f"cell {i} claims {c} vertices beyond the end of the cell list")
        counts[i] = c
        keep[pos + 1: pos + 1 + c] = True
        pos += 1 + c
    return counts, data[keep]


def as_integers(values: np.ndarray, code: str, what: str) -> np.ndarray:
    """Cast numbers to integer type `code`, refusing non-finite, fractional or out-of-range ones."""
    values = np.asarray(values)
    if values.dtype.kind == "f":
        info = np.iinfo(code)
        ok = np.isfinite(values) & (values == np.round(values)) & \
            (values >= info.min) & (values <= info.max)
        if not ok.all():
            raise SurfaceError(f"{what} holds a value that is not a {code} integer")
    return values.astype(code)


def to_numbers(tokens: list, dtype, what: str) -> np.ndarray:
    """Convert ASCII tokens to numbers; a bad token raises SurfaceError naming `what`."""
    try:
        return np.array(tokens, dtype=dtype)
    except (ValueError, OverflowError) as exc:
        raise SurfaceError(f"bad number in {what}: {str(exc)[:80]}") from None


def _column_names(base: str, k: int) -> list[str]:
    return [f"{base}_{a}" for a in "xyz"] if k == 3 else [f"{base}_{i}" for i in range(k)]


def group_fields(columns: dict[str, np.ndarray], declared: dict | None = None) -> dict[str, np.ndarray]:
    """Group ``name_x/_y/_z`` columns into (n, 3) and ``name_0.._k`` into (n, k+1).

    With `declared` ({name: k}, from a surfacekit header) only those are grouped, so
    scalar columns that merely look like components stay as written.
    """
    out: dict[str, np.ndarray] = {}
    used: set[str] = set()
    for col, values in columns.items():
        if col in used:
            continue
        base, _, tail = col.rpartition("_")
        if declared is not None:
            k = declared.get(base, 0)
            names = _column_names(base, k) if col == _column_names(base, max(k, 1))[0] else []
            if not all(c in columns for c in names):
                names = []
        elif base and tail == "x" and all(f"{base}_{a}" in columns for a in "yz"):
            names = [f"{base}_{a}" for a in "xyz"]
        elif base and tail == "0":
            names = []
            while f"{base}_{len(names)}" in columns:
                names.append(f"{base}_{len(names)}")
        else:
            names = []
        if len(names) >= 2 and base not in columns and base not in out:
            out[base] = np.stack([columns[c] for c in names], axis=1)
            used.update(names)
        else:
            out[col] = values
    return out


def field_columns(fields: dict, n: int) -> list[tuple[str, np.ndarray]]:
    """Flatten validated per-vertex fields into named 1-D columns (inverse of `group_fields`)."""
    cols = []
    for name, arr in fields.items():
        a = np.asarray(arr)
        if a.ndim == 1 or a.shape[1] == 1:  # (n, 1) is stored, and read back, as (n,)
            cols.append((name, a.reshape(-1)))
        else:
            cols.extend(zip(_column_names(name, a.shape[1]), a.T))
    return cols


def column_type(a: np.ndarray) -> str:
    """PLY type for a field column: ``int`` (int32) for integer and boolean data, else ``float``."""
    if a.dtype.kind == "b" or a.dtype.kind in "iu":
        return "int"
    return "float"
