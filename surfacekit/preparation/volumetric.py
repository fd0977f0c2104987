"""Rebuild a surface that cannot be repaired in place through an inside/outside grid.

A real mesh can be non-orientable (a Möbius-like twist in its connectivity), made
of pieces that overlap or intersect, or pinched at many points; repairing its
faces one by one then fails or leaves nonsense.  This module decides, for every
cell of a regular grid, whether the cell centre is inside the solid the mesh
describes, and meshes the inside cells with the same marching-cubes path as label
volumes (:func:`surfacekit.preparation.segmentation.from_segmentation`).

Inside test.  The reference is the generalised winding number (Jacobson, Kavan &
Sorkine-Hornung, "Robust inside-outside segmentation using generalized winding
numbers", ACM TOG 32(4), 2013): the sum of signed solid angles of the triangles
seen from a point, divided by 4π (:func:`winding_numbers`, solid angles by Van
Oosterom & Strackee, IEEE Trans. Biomed. Eng. 1983).  Evaluated at every grid cell
it costs cells x faces; the grid uses instead the equivalent count along grid
lines: for a closed, consistently oriented piece the winding number at a point is
the signed number of crossings of the ray from the point towards +z (+1 where the
face normal points up, -1 down), so one sweep of vertical lines per grid column,
vectorised over (triangle, covered column) pairs, gives it for every cell at a
cost proportional to the projected area of the mesh in cells (plus one pass over
the grid: an 8-million-cell grid around a 30k-vertex organ takes about a second).
A cell is inside
when the winding number of the closed orientable pieces is >= 0.5, so overlapping
closed pieces give their union.  Pieces whose orientation cannot be made
consistent (non-orientable, or open) use ray parity with voting (Nooruddin &
Turk, "Simplification and repair of polygonal models using volumetric
techniques", IEEE TVCG 9(2), 2003): the rays towards +x, -x, +y, -y, +z, -z each
vote "inside" when they cross those faces an odd number of times, and a cell is
inside when at least 4 of the 6 vote so.  A stray open sheet flips at most one
of the two rays of an axis, so it cannot turn an outside cell inside by itself.

Limits: the grid resolves nothing thinner than about two cells (thin walls and
gaps narrower than that merge or vanish); a self-intersecting single piece whose
orientation is consistent is counted by its winding number (regions wound twice
are inside, regions wound -1 are outside); grid lines passing exactly through a
mesh edge could count a crossing twice, which the slightly shifted grid origin
makes practically impossible.
"""
from __future__ import annotations

import numpy as np
from scipy import ndimage

from ..mesh.connectivity import Connectivity
from ..mesh.surface import Surface, SurfaceError
from . import repair
from .mesh_quality import part_labels
from .segmentation import from_segmentation

__all__ = ["choose_spacing", "count_crossing_pieces", "inside_grid", "split_parts", "volumetric_parts",
           "winding_numbers"]

#: largest number of grid cells (about 8 million: 64 MB per float64 grid)
MAX_CELLS = 8_000_000
#: the grid has at least this many cells along the longest side of the mesh
MIN_CELLS_ACROSS = 64
#: (triangle, column) pairs evaluated at once in the line sweep
_CHUNK = 400_000
#: the two in-plane axes of the columns along each axis (right-handed with it)
_PLANE = {0: (1, 2), 1: (2, 0), 2: (0, 1)}
#: grid origin shift in cells: irrational fractions so lines miss mesh vertices
_SHIFT = np.array([np.sqrt(2) - 1, np.sqrt(3) - 1, np.sqrt(5) - 2]) * 0.5


def winding_numbers(points: np.ndarray, vertices: np.ndarray, faces: np.ndarray) -> np.ndarray:
    """(p,) generalised winding number of each point (Jacobson, Kavan & Sorkine-Hornung 2013).

    ``w(p) = Σ_t Ω_t(p) / 4π`` with the signed solid angle of triangle t seen from
    p by Van Oosterom & Strackee (1983):
    ``tan(Ω/2) = a·(b×c) / (|a||b||c| + (a·b)|c| + (b·c)|a| + (c·a)|b|)``.
    1 inside and 0 outside a closed outward surface, fractional near holes.
    Cost: points x faces (evaluated in chunks).
    """
    p = np.asarray(points, dtype=np.float64).reshape(-1, 3)
    tri = np.asarray(vertices, dtype=np.float64)[np.asarray(faces)]
    out = np.empty(len(p))
    step = max(1, 2_000_000 // max(len(tri), 1))
    for s in range(0, len(p), step):
        a, b, c = (tri[None, :, k, :] - p[s:s + step, None, :] for k in range(3))
        la, lb, lc = (np.linalg.norm(x, axis=2) for x in (a, b, c))
        det = np.einsum("ijk,ijk->ij", a, np.cross(b, c))
        den = (la * lb * lc + np.einsum("ijk,ijk->ij", a, b) * lc
               + np.einsum("ijk,ijk->ij", b, c) * la + np.einsum("ijk,ijk->ij", c, a) * lb)
        out[s:s + step] = 2.0 * np.arctan2(det, den).sum(axis=1) / (4.0 * np.pi)
    return out


def choose_spacing(vertices: np.ndarray, faces: np.ndarray, voxel_mm: float | None = None,
                   max_cells: int = MAX_CELLS) -> float:
    """Grid spacing (mm): ``voxel_mm`` if given, else the mean edge length, refined to at
    least ``MIN_CELLS_ACROSS`` cells along the longest side; in both cases coarsened
    until the padded grid has at most ``max_cells`` cells."""
    v = np.asarray(vertices, dtype=np.float64)
    extent = np.ptp(v[np.unique(faces)], axis=0)
    if voxel_mm is not None:
        if not np.isfinite(voxel_mm) or voxel_mm <= 0:
            raise ValueError(f"voxel_mm must be a positive number of mm, got {voxel_mm!r}")
        h = float(voxel_mm)
    else:
        edges = Connectivity(faces, len(v)).edges
        h = float(np.linalg.norm(v[edges[:, 1]] - v[edges[:, 0]], axis=1).mean())
        h = min(h, float(extent.max()) / MIN_CELLS_ACROSS)
    if not h > 0:
        raise SurfaceError("the surface has no extent: it encloses no volume")
    while np.prod(np.ceil(extent / h) + 5) > max_cells:
        h *= 1.05
    return h


def _line_hits(tri: np.ndarray, shape: tuple, axis: int):
    """Crossings of the grid lines along ``axis`` with triangles given in grid units.

    Returns (column index, slot, sign): the column ``ib * shape[c] + ic``, ``slot``
    = number of cell centres of the column below the crossing (0..n), and the sign
    of the normal's ``axis`` component (+1 leaving upwards)."""
    b, c = _PLANE[axis]
    lo_b = np.clip(np.ceil(tri[:, :, b].min(1)), 0, shape[b]).astype(np.int64)
    hi_b = np.clip(np.floor(tri[:, :, b].max(1)), -1, shape[b] - 1).astype(np.int64)
    lo_c = np.clip(np.ceil(tri[:, :, c].min(1)), 0, shape[c]).astype(np.int64)
    hi_c = np.clip(np.floor(tri[:, :, c].max(1)), -1, shape[c] - 1).astype(np.int64)
    nc = np.maximum(hi_c - lo_c + 1, 0)
    count = np.maximum(hi_b - lo_b + 1, 0) * nc
    ends = np.cumsum(count)
    cols, slots, signs = [], [], []
    start_t = 0
    while start_t < len(tri):
        base = ends[start_t - 1] if start_t else 0
        stop_t = max(int(np.searchsorted(ends, base + _CHUNK, side="right")), start_t + 1)
        idx = np.arange(start_t, stop_t)
        t = np.repeat(idx, count[idx])
        local = np.arange(len(t)) - np.repeat(ends[idx] - count[idx] - base, count[idx])
        ib = lo_b[t] + local // np.maximum(nc[t], 1)
        ic = lo_c[t] + local % np.maximum(nc[t], 1)
        pb = tri[t][:, :, b] - ib[:, None]
        pc = tri[t][:, :, c] - ic[:, None]
        w = np.stack([pb[:, (k + 1) % 3] * pc[:, (k + 2) % 3] - pc[:, (k + 1) % 3] * pb[:, (k + 2) % 3]
                      for k in range(3)], axis=1)  # barycentric weights x 2 area
        d = w.sum(axis=1)
        hit = (d != 0) & (np.all(w >= 0, axis=1) | np.all(w <= 0, axis=1))
        za = (w[hit] * tri[t[hit]][:, :, axis]).sum(axis=1) / d[hit]
        cols.append(ib[hit] * shape[c] + ic[hit])
        slots.append(np.clip(np.ceil(za), 0, shape[axis]).astype(np.int64))
        signs.append(np.sign(d[hit]))
        start_t = stop_t
    return np.concatenate(cols), np.concatenate(slots), np.concatenate(signs)


def _above(tri: np.ndarray, shape: tuple, axis: int, signed: bool) -> np.ndarray:
    """Per cell (grid axis order), the signed or unsigned number of crossings above it
    along ``axis``, and the total per line (last slot)."""
    b, c = _PLANE[axis]
    n = shape[axis]
    col, slot, sign = _line_hits(tri, shape, axis)
    weights = sign if signed else np.ones(len(col))
    flat = np.bincount(col * (n + 1) + slot, weights=weights,
                       minlength=shape[b] * shape[c] * (n + 1)).reshape(-1, n + 1)
    rc = np.cumsum(flat[:, ::-1], axis=1)[:, ::-1]  # rc[:, s] = crossings in slots >= s
    above = rc[:, 1:].reshape(shape[b], shape[c], n)  # cell i lies below slots >= i+1
    total = rc[:, :1].reshape(shape[b], shape[c], 1)
    order = np.argsort([b, c, axis])
    return np.transpose(above, order), np.transpose(total, order)


def _orient_pieces(v: np.ndarray, f: np.ndarray, *, as_list: bool = False):
    """Split faces into closed orientable pieces (oriented outward) and the rest."""
    conn = Connectivity(f, len(v))
    patch = conn.face_components
    closed, other = [], []
    for p in np.unique(patch):
        fp = f[patch == p]
        try:
            fp, _ = repair.orient_consistently(fp)
        except SurfaceError:
            other.append(fp)
            continue
        if not Connectivity(fp, len(v)).is_closed:
            other.append(fp)
            continue
        closed.append(fp if Surface(v, fp).signed_volume >= 0 else fp[:, ::-1])
    if as_list:
        return closed, other
    stack = (lambda x: np.vstack(x) if x else np.zeros((0, 3), np.int64))
    return stack(closed), stack(other)


def count_crossing_pieces(vertices: np.ndarray, faces: np.ndarray, max_pieces: int = 12,
                          samples: int = 128) -> int:
    """Number of pairs of closed pieces whose surfaces cross (one partly inside the other).

    For the ``max_pieces`` largest closed orientable pieces whose bounding boxes
    overlap, up to ``samples`` vertices of each are tested against the other by
    :func:`winding_numbers`; vertices both inside and outside mean the surfaces
    cross.  Nested pieces (a cavity) and touching pieces do not count.  A small
    overlap between sample points can be missed (``volumetric=True`` in
    :func:`surfacekit.prepare` forces the grid route).
    """
    v = np.asarray(vertices, dtype=np.float64)
    v, f, _ = repair.merge_duplicate_vertices(v, np.asarray(faces, np.int64))
    closed, _ = _orient_pieces(v, f, as_list=True)
    closed = sorted(closed, key=len, reverse=True)[:max_pieces]
    boxes = [(v[np.unique(p)].min(0), v[np.unique(p)].max(0)) for p in closed]
    n = 0
    for i in range(len(closed)):
        for j in range(i + 1, len(closed)):
            (lo_i, hi_i), (lo_j, hi_j) = boxes[i], boxes[j]
            if np.any(lo_i > hi_j) or np.any(lo_j > hi_i):
                continue
            n += bool(_partly_inside(v, closed[i], closed[j], samples)
                      or _partly_inside(v, closed[j], closed[i], samples))
    return n


def _partly_inside(v: np.ndarray, fa: np.ndarray, fb: np.ndarray, samples: int) -> bool:
    ids = np.setdiff1d(np.unique(fa), fb)  # a vertex shared with fb is on it, undecided
    if len(ids) == 0:
        return False
    ids = ids[np.linspace(0, len(ids) - 1, min(samples, len(ids))).astype(int)]
    w = winding_numbers(v[ids], v, fb)  # about 0.5 on fb itself: counts neither way
    return bool(np.any(w > 0.75) and np.any(w < 0.25))


def inside_grid(vertices: np.ndarray, faces: np.ndarray, spacing: float):
    """Inside/outside of every cell centre of a grid covering the mesh.

    Returns ``(inside, origin, route)``: ``inside`` (nx, ny, nz) bool, cell (i, j, k)
    centred at ``origin + spacing * (i, j, k)`` (mm); ``route`` says which test
    decided ("winding number", "parity vote" or both).  See the module docstring.
    """
    v = np.asarray(vertices, dtype=np.float64)
    f = np.asarray(faces, dtype=np.int64)
    used = v[np.unique(f)]
    origin = used.min(axis=0) - (2.0 + _SHIFT) * spacing
    shape = tuple(int(x) for x in np.ceil((used.max(axis=0) - origin) / spacing) + 3)
    g = (v - origin) / spacing
    closed, other = _orient_pieces(v, f)
    inside = np.zeros(shape, bool)
    routes = []
    if len(closed):
        inside |= _above(g[closed], shape, 2, signed=True)[0] >= 0.5
        routes.append("winding number")
    if len(other):
        votes = np.zeros(shape, np.int8)
        for axis in range(3):
            above, total = _above(g[other], shape, axis, signed=False)
            up = np.mod(above, 2).astype(np.int8)
            votes += up + np.mod(total - above, 2).astype(np.int8)
        inside |= votes >= 4
        routes.append("parity vote of 6 axis rays")
    return inside, origin, " and ".join(routes)


def volumetric_parts(surface: Surface, voxel_mm: float | None = None):
    """Closed surfaces of the parts of the inside grid, largest first.

    Returns ``(parts, info)``: ``parts`` a list of ``(Surface, inside_volume_mm3)``
    (inside-cell count x cell volume, the robust volume each surface is held to),
    ``info`` a dict with the spacing (mm), grid shape, the inside test used and
    the total inside volume.
    """
    v, f = np.asarray(surface.vertices, np.float64), np.asarray(surface.faces, np.int64)
    v, f, _ = repair.merge_duplicate_vertices(v, f)
    v, f, _ = repair.remove_degenerate_faces(v, f)
    v, f, _ = repair.remove_duplicate_faces(v, f)
    if len(f) == 0:
        raise SurfaceError("no valid faces: nothing to rebuild")
    h = choose_spacing(v, f, voxel_mm)
    inside, origin, route = inside_grid(v, f, h)
    labels, n = ndimage.label(inside)
    if n == 0:
        raise SurfaceError(f"no grid cell of {h:.3g} mm lies inside the surface: it encloses "
                           "no volume at this spacing (try a smaller voxel_mm)")
    counts = np.bincount(labels.ravel())[1:]
    affine = np.diag([h, h, h, 1.0])
    affine[:3, 3] = origin
    parts = []
    for lab in np.argsort(-counts, kind="stable") + 1:
        part = from_segmentation(labels == lab, None, affine=affine)
        parts.append((part, float(counts[lab - 1]) * h ** 3))
    info = {"voxel_mm": h, "grid_shape": list(inside.shape), "inside_test": route,
            "inside_volume_mm3": float(inside.sum()) * h ** 3, "n_parts": int(n)}
    return parts, info


def split_parts(v: np.ndarray, f: np.ndarray) -> list[np.ndarray]:
    """Face index arrays of the parts a user sees, largest area first: faces joined
    through shared edges (pieces touching only at a vertex are separate parts)."""
    labels = part_labels(f, len(v))
    area = np.bincount(labels, weights=Surface(v, f).face_areas)
    order = np.argsort(-area, kind="stable")
    return [np.flatnonzero(labels == k) for k in order if np.any(labels == k)]
