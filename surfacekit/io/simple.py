"""OFF, OBJ and STL reading and writing with NumPy (no third-party loader).

Each reader takes the whole file as ``bytes`` and returns ``(vertices (n, 3)
float64, faces (m, 3) int64, fields {}, format name)``; counts found in headers
are checked against the data present before anything is allocated.  Problems
raise ``SurfaceError`` with a one-line message (``surfacekit.io`` adds the file
name).  Format layouts are common practice: OFF (Geomview object file format),
Wavefront OBJ (only ``v`` and ``f`` records are read; material and other files it
names are never opened), STL (3D Systems; binary = 80-byte header, uint32
triangle count, 50 bytes per triangle, little-endian).
"""
from __future__ import annotations

import io as _io
import re

import numpy as np

from ..mesh.surface import SurfaceError
from .parsing import as_integers, fan_triangulate, to_numbers


def _text_lines(data: bytes) -> list[bytes]:
    """Non-blank lines with ``#`` comments removed."""
    if b"#" in data:
        data = re.sub(rb"#[^\r\n]*", b"", data)
    return [ln for ln in data.splitlines() if ln and not ln.isspace()]


def _rows(lines: list[bytes], what: str, drop_slash: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """All numbers of `lines` (flat) and the number of tokens on each line.

    `drop_slash` removes OBJ texture/normal references (``a/b/c`` -> ``a``).
    """
    joined = b"\n".join(lines)
    if drop_slash and b"/" in joined:
        joined = re.sub(rb"/\S*", b"", joined)
    # normalise to single spaces inside lines (re.sub is slow with many matches: skip if clean)
    if any(c in joined for c in (b"\t", b"\r", b"\f", b"\v", b"  ")):
        joined = re.sub(rb"[ \t\r\f\v]+", b" ", joined)
    if b" \n" in joined or b"\n " in joined:
        joined = re.sub(rb" ?\n ?", b"\n", joined)
    joined = joined.strip(b" ")
    buf = np.frombuffer(joined, np.uint8)
    # tokens per line = spaces on that line + 1, counted without a Python loop
    line_of_space = np.searchsorted(np.flatnonzero(buf == 10), np.flatnonzero(buf == 32))
    widths = np.bincount(line_of_space, minlength=len(lines)) + 1
    tokens = joined.split()
    if widths.sum() != len(tokens):
        raise SurfaceError(f"blank record in {what}")
    return to_numbers(tokens, np.float64, what), widths


# ------------------------------------------------------------------------------ OFF
def read_off(data: bytes):
    """Parse ASCII OFF (also COFF/NOFF/CNOFF headers; colours and normals are ignored)."""
    lines = _text_lines(data)
    if not lines:
        raise SurfaceError("OFF file holds no data")
    head = lines[0].split()
    if not head[0].endswith(b"OFF") or len(head[0]) > 8:
        raise SurfaceError("not an OFF file (missing OFF magic line)")
    if b"4" in head[0] or b"n" in head[0]:
        raise SurfaceError(f"OFF variant {head[0].decode()!r} (4D or n-dimensional) not supported")
    if len(head) > 1 and head[1] == b"BINARY":
        raise SurfaceError("binary OFF is not supported")
    rest = head[1:] if len(head) > 1 else (lines[1].split() if len(lines) > 1 else [])
    body = 1 if len(head) > 1 else 2
    counts = to_numbers(rest[:2], np.int64, "OFF counts") if len(rest) >= 2 else None
    if counts is None or counts.min() < 0:
        raise SurfaceError("OFF counts line is missing or negative")
    nv, nf = int(counts[0]), int(counts[1])
    if nv + nf > len(lines) - body:
        raise SurfaceError(f"OFF header declares {nv} vertices and {nf} faces but the file "
                           f"has only {len(lines) - body} data lines")
    if nf == 0:
        raise SurfaceError("OFF file has no faces (point cloud, not a surface)")
    vals, widths = _rows(lines[body: body + nv], "OFF vertices")
    if widths.min(initial=3) < 3:
        raise SurfaceError("OFF vertex line with fewer than 3 coordinates")
    starts = np.cumsum(widths) - widths
    vertices = vals[starts[:, None] + np.arange(3)]
    fvals, fwidths = _rows(lines[body + nv: body + nv + nf], "OFF faces")
    fstarts = np.cumsum(fwidths) - fwidths
    counts = as_integers(fvals[fstarts], "i8", "OFF face vertex count")
    if np.any(counts < 0) or np.any(counts + 1 > fwidths):
        raise SurfaceError("OFF face line has fewer indices than its count says")
    # indices of each face: positions fstart+1 .. fstart+count (extra colour values dropped)
    pick = np.repeat(fstarts + 1, counts) + (np.arange(counts.sum()) -
                                            np.repeat(np.cumsum(counts) - counts, counts))
    faces = fan_triangulate(counts, as_integers(fvals[pick], "i8", "OFF face indices"))
    return vertices, faces, {}, "off"


def write_off(fh, vertices, faces):
    buf = _io.StringIO()
    buf.write(f"OFF\n{len(vertices)} {len(faces)} 0\n")
    np.savetxt(buf, vertices, fmt="%.17g")
    np.savetxt(buf, np.asarray(faces, np.int64), fmt="3 %d %d %d")
    fh.write(buf.getvalue().encode("ascii"))


# ------------------------------------------------------------------------------ OBJ
def read_obj(data: bytes):
    """Parse Wavefront OBJ ``v`` and ``f`` records (``f a/b/c``, negative indices, polygons)."""
    lines = [ln.lstrip() for ln in _text_lines(data)]
    keys = np.array([ln[:2] for ln in lines], dtype="S2")
    is_v = (keys == b"v ") | (keys == b"v\t")
    is_f = (keys == b"f ") | (keys == b"f\t")
    if not is_v.any():
        raise SurfaceError("OBJ file has no vertex ('v') records")
    if not is_f.any():
        raise SurfaceError("OBJ file has no face ('f') records (point cloud, not a surface)")
    vals, widths = _rows([lines[i][2:] for i in np.flatnonzero(is_v)], "OBJ vertices")
    if widths.min() < 3:
        raise SurfaceError("OBJ 'v' record with fewer than 3 coordinates")
    starts = np.cumsum(widths) - widths
    vertices = vals[starts[:, None] + np.arange(3)]
    f_idx = np.flatnonzero(is_f)
    # texture and normal references (a/b/c) are dropped; only the vertex index is kept
    flat, counts = _rows([lines[i][2:] for i in f_idx], "OBJ faces", drop_slash=True)
    flat = as_integers(flat, "i8", "OBJ face indices")
    if np.any(flat == 0):
        raise SurfaceError("OBJ face index 0 (indices start at 1)")
    if np.any(flat < 0):  # relative to the vertices defined before the face line
        base = np.repeat(np.cumsum(is_v)[f_idx], counts)
        flat = np.where(flat < 0, base + flat, flat - 1)
    else:
        flat = flat - 1
    return vertices, fan_triangulate(counts, flat), {}, "obj"


def write_obj(fh, vertices, faces):
    buf = _io.StringIO()
    buf.write("# written by surfacekit\n")
    np.savetxt(buf, vertices, fmt="v %.17g %.17g %.17g")
    np.savetxt(buf, np.asarray(faces, np.int64) + 1, fmt="f %d %d %d")
    fh.write(buf.getvalue().encode("ascii"))


# ------------------------------------------------------------------------------ STL
_STL_DTYPE = np.dtype([("normal", "<f4", (3,)), ("v", "<f4", (3, 3)), ("attr", "<u2")])


def _weld(corners: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Merge exactly equal corner positions; vertices keep their first-appearance order."""
    if not np.all(np.isfinite(corners)):
        kind = "NaN" if np.isnan(corners).any() else "infinite"
        raise SurfaceError(f"{kind} vertex coordinates in STL triangles")
    c = corners + 0.0  # -0.0 becomes 0.0
    order = np.lexsort((c[:, 2], c[:, 1], c[:, 0]))
    sc = c[order]
    new = np.ones(len(c), dtype=bool)
    new[1:] = np.any(sc[1:] != sc[:-1], axis=1)
    group = np.cumsum(new) - 1
    first = np.minimum.reduceat(order, np.flatnonzero(new))  # first corner of each position
    rank = np.empty(first.size, dtype=np.int64)
    rank[np.argsort(first, kind="stable")] = np.arange(first.size)
    vertex_of_corner = np.empty(len(c), dtype=np.int64)
    vertex_of_corner[order] = rank[group]
    return c[np.sort(first)], vertex_of_corner.reshape(-1, 3)


def read_stl(data: bytes):
    """Parse binary or ASCII STL; identical corner positions are welded into shared vertices."""
    size = len(data)
    looks_ascii = data.lstrip()[:5].lower() == b"solid"
    if size >= 84:
        n = int(np.frombuffer(data, "<u4", 1, 80)[0])
        expected = 84 + 50 * n
        if size == expected:
            if n == 0:
                raise SurfaceError("binary STL holds no triangles")
            tri = np.frombuffer(data, _STL_DTYPE, n, 84)
            vertices, faces = _weld(tri["v"].reshape(-1, 3).astype(np.float64))
            return vertices, faces, {}, "stl-binary"
    if looks_ascii:
        return _read_stl_ascii(data)
    if size < 84:
        raise SurfaceError(f"too short for a binary STL ({size} bytes, need at least 84)")
    if size < expected:
        raise SurfaceError(f"truncated binary STL: header says {n} triangles ({expected} bytes) "
                           f"but the file has {size} bytes")
    raise SurfaceError(f"binary STL has {size - expected} unexpected bytes after {n} triangles")


def _read_stl_ascii(data: bytes):
    found = re.findall(rb"vertex\s+(\S+\s+\S+\s+\S+)", data, flags=re.IGNORECASE)
    if not found:
        raise SurfaceError("ASCII STL holds no triangles ('vertex' records)")
    if len(found) % 3:
        raise SurfaceError(f"ASCII STL has {len(found)} vertex records, not a multiple of 3")
    n_facets = len(re.findall(rb"endfacet", data, flags=re.IGNORECASE))
    if n_facets * 3 != len(found):
        raise SurfaceError(f"ASCII STL has {n_facets} complete facets for {len(found)} vertices")
    corners = to_numbers(b" ".join(found).split(), np.float64, "ASCII STL vertices")
    vertices, faces = _weld(corners.reshape(-1, 3))
    return vertices, faces, {}, "stl-ascii"


def write_stl(fh, vertices, faces, *, binary: bool = True, normals=None):
    """Write STL; `normals` (m, 3) are the face normals (zero for degenerate faces)."""
    tri = vertices[np.asarray(faces)]
    if binary:
        header = b"binary STL written by surfacekit".ljust(80, b" ")
        rec = np.zeros(len(faces), _STL_DTYPE)
        rec["normal"] = normals
        rec["v"] = tri
        fh.write(header + np.uint32(len(faces)).tobytes() + rec.tobytes())
        return
    buf = _io.StringIO()
    buf.write("solid surfacekit\n")
    table = np.concatenate([normals, tri.reshape(-1, 9)], axis=1)
    np.savetxt(buf, table, fmt="facet normal %.9g %.9g %.9g\n outer loop\n"
               "  vertex %.17g %.17g %.17g\n  vertex %.17g %.17g %.17g\n  vertex %.17g %.17g %.17g\n"
               " endloop\nendfacet")
    buf.write("endsolid surfacekit\n")
    fh.write(buf.getvalue().encode("ascii"))
