"""Landmark pair files: vertex indices or coordinates in mm, CSV or NPZ.

Indices refer to one triangulation; coordinates (mm) survive resampling and are
snapped to the nearest vertex of the surfaces they are used with (nearest
neighbour by k-d tree, Bentley, "Multidimensional binary search trees used for
associative searching", Communications of the ACM 18(9), 1975).
"""
from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from ..io.files import atomic_path, load_fields, save_fields
from ..mesh.surface import Surface

#: CSV columns of landmarks given as points in mm (source point, target point)
COORDINATE_COLUMNS = ("source_x", "source_y", "source_z", "target_x", "target_y", "target_z")
INDEX_COLUMNS = ("source_vertex", "target_vertex")


def save_landmarks(landmarks: dict, path) -> Path:
    """Write landmark pairs from :meth:`Correspondence.landmarks` to CSV or NPZ (by suffix), atomically.

    The CSV has the header ``index,source_vertex,target_vertex,source_x,source_y,
    source_z,target_x,target_y,target_z,confidence`` (coordinates in mm).
    """
    path = Path(path)
    suffix = path.suffix.lower()
    keys = ("source_index", "target_index", "source_xyz", "target_xyz", "confidence")
    missing = [k for k in keys if k not in landmarks]
    if missing:
        raise ValueError(f"landmarks dict lacks {missing}")
    if suffix == ".npz":
        return save_fields(path, **{k: np.asarray(landmarks[k]) for k in keys})
    if suffix != ".csv":
        raise ValueError(f"landmark file must end in .csv or .npz, got {path.name!r}")
    with atomic_path(path) as tmp, open(tmp, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["index", *INDEX_COLUMNS, *COORDINATE_COLUMNS, "confidence"])
        for r, (i, j, p, q, c) in enumerate(zip(*(landmarks[k] for k in keys))):
            w.writerow([r, int(i), int(j), *(f"{x:.6f}" for x in p), *(f"{x:.6f}" for x in q),
                        f"{float(c):.4f}"])
    return path


def _read_npz(path: Path) -> tuple[np.ndarray | None, np.ndarray | None]:
    f = load_fields(path)
    pairs = points = None
    if "source_index" in f and "target_index" in f:
        pairs = np.stack([np.ravel(f["source_index"]), np.ravel(f["target_index"])], axis=1)
    if "source_xyz" in f and "target_xyz" in f:
        s, t = np.asarray(f["source_xyz"], float), np.asarray(f["target_xyz"], float)
        if s.shape != t.shape or s.ndim != 2 or s.shape[1] != 3:
            raise ValueError(f"{path.name}: 'source_xyz' and 'target_xyz' must both be (l, 3)")
        points = np.stack([s, t], axis=1)
    if pairs is None and points is None:
        raise ValueError(f"{path.name}: NPZ landmark file needs 'source_index' and 'target_index' "
                         "arrays or 'source_xyz' and 'target_xyz' (mm)")
    return pairs, points


def _read_csv(path: Path) -> tuple[np.ndarray | None, np.ndarray | None]:
    try:
        rows = list(csv.reader(path.read_text(encoding="utf-8").splitlines()))
    except UnicodeDecodeError:
        raise ValueError(f"{path.name}: landmark file is not a text CSV") from None
    rows = [r for r in rows if r and any(c.strip() for c in r)]
    index_cols: tuple[int, ...] | None = (0, 1)
    coord_cols: tuple[int, ...] | None = None
    start = 0
    if rows and not rows[0][0].strip().lstrip("-").isdigit():  # a header
        head = [c.strip() for c in rows[0]]
        index_cols = tuple(head.index(c) for c in INDEX_COLUMNS) if set(INDEX_COLUMNS) <= set(head) else None
        if set(COORDINATE_COLUMNS) <= set(head):
            coord_cols = tuple(head.index(c) for c in COORDINATE_COLUMNS)
        if index_cols is None and coord_cols is None:
            raise ValueError(f"{path.name}: landmark CSV header needs 'source_vertex' and "
                             f"'target_vertex' columns, or {','.join(COORDINATE_COLUMNS)} (mm)")
        start = 1
    pairs, points = [], []
    for n, r in enumerate(rows[start:], start=start + 1):
        try:
            if index_cols is not None:
                pairs.append([int(r[c]) for c in index_cols])
            if coord_cols is not None:
                points.append([float(r[c]) for c in coord_cols])
        except (ValueError, IndexError):
            what = "two vertex indices" if coord_cols is None else "the landmark columns"
            raise ValueError(f"{path.name}: row {n} does not hold {what}") from None
    return (np.array(pairs, dtype=np.int64).reshape(-1, 2) if index_cols is not None else None,
            np.array(points, dtype=float).reshape(-1, 2, 3) if coord_cols is not None else None)


def read_landmark_file(path) -> tuple[np.ndarray | None, np.ndarray | None]:
    """Read a landmark file as given: ``(pairs, points)``, either may be None.

    ``pairs`` is (l, 2) int64 vertex indices (columns ``source_vertex,target_vertex``,
    two bare integer columns, or NPZ ``source_index``/``target_index``); ``points``
    is (l, 2, 3) float mm, source point then target point (columns
    ``source_x,source_y,source_z,target_x,target_y,target_z``, or NPZ
    ``source_xyz``/``target_xyz``).  Problems raise ValueError naming the file and row.
    """
    path = Path(path)
    if not path.is_file():
        raise ValueError(f"no such landmark file: {path}")
    pairs, points = _read_npz(path) if path.suffix.lower() == ".npz" else _read_csv(path)
    n = len(pairs) if pairs is not None else len(points)
    if not n:
        raise ValueError(f"{path.name}: no landmark pairs")
    if pairs is not None and (not np.issubdtype(pairs.dtype, np.integer) or pairs.min() < 0):
        raise ValueError(f"{path.name}: landmark vertices must be non-negative integers")
    if points is not None and not np.all(np.isfinite(points)):
        raise ValueError(f"{path.name}: landmark coordinates must be finite numbers (mm)")
    return (None if pairs is None else pairs.astype(np.int64)), points


def snap_landmarks(points: np.ndarray, source: Surface, target: Surface) -> tuple[np.ndarray, np.ndarray]:
    """Nearest source and target vertex of each landmark point pair.

    Parameters
    ----------
    points : (l, 2, 3) mm, source point then target point of each pair

    Returns
    -------
    pairs : (l, 2) int64 vertex indices
    distances : (l, 2) mm from each point to the vertex it was snapped to
    """
    from scipy.spatial import cKDTree

    points = np.asarray(points, dtype=float).reshape(-1, 2, 3)
    pairs = np.empty((len(points), 2), dtype=np.int64)
    dist = np.empty((len(points), 2))
    for side, surface in enumerate((source, target)):
        dist[:, side], pairs[:, side] = cKDTree(surface.vertices).query(points[:, side])
    return pairs, dist


def check_landmark_indices(pairs: np.ndarray, source: Surface, target: Surface, name: str) -> None:
    """ValueError naming the file when a landmark vertex index is beyond its surface."""
    for side, surface in enumerate((source, target)):
        if pairs[:, side].max() >= surface.n_vertices:
            which = ("source", "target")[side]
            raise ValueError(f"{name}: {which} vertex {int(pairs[:, side].max())} does not exist "
                             f"(the {which} surface has {surface.n_vertices} vertices)")


def load_landmarks(path, source: Surface | None = None, target: Surface | None = None) -> np.ndarray:
    """Read landmark pairs (source vertex, target vertex) from CSV or NPZ, (l, 2) int64.

    Accepts what :func:`save_landmarks` writes, a plain CSV of two integer columns
    without header, and points in mm (columns
    ``source_x,source_y,source_z,target_x,target_y,target_z``).  Given the
    `source` and `target` surfaces, points are snapped to their nearest vertices
    (:func:`snap_landmarks`), and win over indices when a file holds both, so a
    file keeps its meaning after the surfaces are resampled; indices are checked
    against the vertex counts.  Without the surfaces, a file of points only raises
    ValueError (they cannot become vertices).  Problems raise ValueError naming
    the file and the row.
    """
    pairs, points = read_landmark_file(path)
    name = Path(path).name
    if source is not None and target is not None:
        if points is not None:
            return snap_landmarks(points, source, target)[0]
        check_landmark_indices(pairs, source, target, name)
    if pairs is None:
        raise ValueError(f"{name}: landmarks are given as coordinates (mm); pass the source and "
                         "target surfaces to snap them to vertices")
    return pairs
