"""Legacy VTK polydata (``.vtk``) reading and writing, ASCII and binary.

Layout from the VTK User's Guide, "VTK File Formats" (Kitware; legacy format,
versions 2.0-5.1): four header lines (version, title, ASCII|BINARY, DATASET),
then POINTS, cell sections (VERTICES, LINES, POLYGONS, TRIANGLE_STRIPS; classic
``count i j k`` lists or the 5.1 OFFSETS/CONNECTIVITY pair) and POINT_DATA /
CELL_DATA attributes.  Binary data are big-endian.  Polygons are fan-triangulated;
vertices and lines are ignored; triangle strips are refused.  POINT_DATA
SCALARS, VECTORS, NORMALS, TEXTURE_COORDINATES, TENSORS and FIELD arrays become
per-vertex fields.  Every count is checked against the bytes present before any
array is allocated.
"""
from __future__ import annotations

import io as _io
import re

import numpy as np

from ..mesh.surface import SurfaceError
from .parsing import FIELD_NAME, fan_triangulate, split_cells, to_numbers

# VTK type name -> numpy type code (big-endian applied in binary files).  "long" is
# taken as 8 bytes, its size on 64-bit Linux writers (from memory, not verified).
VTK_TYPES = {
    "char": "i1", "unsigned_char": "u1", "short": "i2", "unsigned_short": "u2",
    "int": "i4", "unsigned_int": "u4", "long": "i8", "unsigned_long": "u8",
    "float": "f4", "double": "f8", "vtkidtype": "i4",
    "vtktypeint8": "i1", "vtktypeuint8": "u1", "vtktypeint16": "i2", "vtktypeuint16": "u2",
    "vtktypeint32": "i4", "vtktypeuint32": "u4", "vtktypeint64": "i8", "vtktypeuint64": "u8",
    "vtktypefloat32": "f4", "vtktypefloat64": "f8",
}
_SPACE = re.compile(rb"\s*")
_CELL_SECTIONS = ("VERTICES", "LINES", "POLYGONS", "TRIANGLE_STRIPS")


class _Cursor:
    """Reads keyword lines and typed value blocks from a legacy VTK body."""

    def __init__(self, data: bytes, pos: int, binary: bool):
        self.data, self.pos, self.binary = data, pos, binary

    def _skip_space(self) -> None:
        self.pos = _SPACE.match(self.data, self.pos).end()

    def line(self) -> list[str] | None:
        """Tokens of the next non-blank line (None at end of data)."""
        self._skip_space()
        if self.pos >= len(self.data):
            return None
        end = self.data.find(b"\n", self.pos)
        end = len(self.data) if end < 0 else end
        raw = self.data[self.pos: end]
        self.pos = end + 1
        try:
            return raw.decode("ascii").split()
        except UnicodeDecodeError:
            raise SurfaceError("VTK keyword line is not ASCII text (misplaced binary data?)") from None

    def peek_word(self) -> bytes:
        """The next word, without moving (binary data may start with whitespace bytes)."""
        start = _SPACE.match(self.data, self.pos).end()
        words = self.data[start: start + 16].split(maxsplit=1)
        return words[0] if words else b""

    def skip_metadata(self) -> None:
        """Skip a METADATA block: lines up to the first empty line."""
        end = self.data.find(b"\n\n", self.pos)
        self.pos = len(self.data) if end < 0 else end + 2

    def values(self, n: int, vtk_type: str, what: str) -> np.ndarray:
        code = VTK_TYPES.get(vtk_type.lower())
        if code is None:
            raise SurfaceError(f"unknown VTK data type {vtk_type!r} in {what}")
        if n < 0:
            raise SurfaceError(f"negative count in {what}")
        left = len(self.data) - self.pos
        if self.binary:
            size = n * np.dtype(code).itemsize
            if size > left:
                raise SurfaceError(f"{what} declares {n} values ({size} bytes) but only "
                                   f"{left} bytes follow")
            out = np.frombuffer(self.data, ">" + code, n, self.pos).astype(code)
            self.pos += size
            return out
        if n > left // 2 + 1:  # each ASCII value takes at least a digit and a separator
            raise SurfaceError(f"{what} declares {n} values but only {left} bytes follow")
        parts = self.data[self.pos:].split(maxsplit=n)
        if len(parts) < n:
            raise SurfaceError(f"{what} ends after {len(parts)} of {n} values")
        self.data, self.pos = (parts[n] if len(parts) > n else b""), 0
        kind = np.float64 if code[0] == "f" else np.int64
        return to_numbers(parts[:n], kind, what).astype(code)


def _int(tok: str, what: str) -> int:
    if not tok.isdigit():
        raise SurfaceError(f"bad count {tok!r} in VTK {what}")
    return int(tok)


def _cells(cur: _Cursor, words: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Read one cell section; returns (counts, flat point indices)."""
    if len(words) != 3:
        raise SurfaceError(f"bad VTK {words[0]} line")
    a, b = _int(words[1], words[0]), _int(words[2], words[0])
    if cur.peek_word() == b"OFFSETS":  # VTK 5.1 layout
        w = cur.line()
        offsets = cur.values(a, w[1] if len(w) > 1 else "", f"{words[0]} offsets").astype(np.int64)
        w = cur.line()
        if not w or w[0] != "CONNECTIVITY":
            raise SurfaceError(f"VTK {words[0]} offsets not followed by CONNECTIVITY")
        conn = cur.values(b, w[1] if len(w) > 1 else "", f"{words[0]} connectivity")
        if a == 0:
            return np.empty(0, np.int64), np.empty(0, np.int64)
        counts = np.diff(offsets)
        if offsets[0] != 0 or offsets[-1] != b or np.any(counts < 0):
            raise SurfaceError(f"VTK {words[0]} offsets are inconsistent")
        return counts, conn.astype(np.int64)
    data = cur.values(b, "int", f"{words[0]} cell list")
    return split_cells(data, a)


def _attribute(cur: _Cursor, words: list[str], n: int, fields: dict) -> None:
    """Read one POINT_DATA/CELL_DATA attribute of `n` tuples into `fields`."""
    key = words[0]
    if key == "SCALARS" and len(words) in (3, 4):
        ncomp = _int(words[3], key) if len(words) == 4 else 1
        if cur.peek_word() == b"LOOKUP_TABLE":
            cur.line()
        vals = cur.values(n * ncomp, words[2], f"SCALARS {words[1]}")
        fields[words[1]] = vals if ncomp == 1 else vals.reshape(n, ncomp)
    elif key in ("VECTORS", "NORMALS") and len(words) == 3:
        fields[words[1]] = cur.values(3 * n, words[2], f"{key} {words[1]}").reshape(n, 3)
    elif key == "TEXTURE_COORDINATES" and len(words) == 4:
        dim = _int(words[2], key)
        fields[words[1]] = cur.values(n * dim, words[3], f"{key} {words[1]}").reshape(n, dim)
    elif key == "TENSORS" and len(words) == 3:
        fields[words[1]] = cur.values(9 * n, words[2], f"TENSORS {words[1]}").reshape(n, 9)
    elif key == "COLOR_SCALARS" and len(words) == 3:
        cur.values(n * _int(words[2], key), "unsigned_char" if cur.binary else "float", key)
    elif key == "LOOKUP_TABLE" and len(words) == 3:
        cur.values(4 * _int(words[2], key), "unsigned_char" if cur.binary else "float", key)
    elif key == "FIELD" and len(words) == 3:
        for _ in range(_int(words[2], key)):
            w = cur.line()
            if w is None or len(w) != 4:
                raise SurfaceError("bad VTK FIELD array line")
            ncomp, ntup = _int(w[1], "FIELD"), _int(w[2], "FIELD")
            vals = cur.values(ncomp * ntup, w[3], f"FIELD array {w[0]}")
            if ntup == n:
                fields[w[0]] = vals if ncomp == 1 else vals.reshape(n, ncomp)
    else:
        raise SurfaceError(f"unknown or malformed VTK attribute line {' '.join(words)[:60]!r}")


def read_vtk(data: bytes):
    """Parse legacy VTK POLYDATA -> (vertices, faces, fields, format name)."""
    head = data.split(b"\n", 3)
    if len(head) < 4 or not head[0].startswith(b"# vtk DataFile"):
        raise SurfaceError("not a legacy VTK file (missing '# vtk DataFile' line)")
    mode = head[2].strip().upper()
    if mode not in (b"ASCII", b"BINARY"):
        raise SurfaceError("VTK third line must be ASCII or BINARY")
    cur = _Cursor(data, len(data) - len(head[3]), mode == b"BINARY")
    words = cur.line()
    if not words or words[0] != "DATASET":
        raise SurfaceError("VTK file has no DATASET line")
    if len(words) < 2 or words[1].upper() != "POLYDATA":
        raise SurfaceError(f"VTK dataset {' '.join(words[1:2])!r} not supported (only POLYDATA)")
    points, polys, n_cells, fields = None, [], 0, {}
    attribute_target, target_n = None, 0
    while (words := cur.line()) is not None:
        key = words[0]
        if key == "METADATA":
            cur.skip_metadata()
        elif key == "POINTS" and len(words) == 3 and points is None:
            n = _int(words[1], "POINTS")
            points = cur.values(3 * n, words[2], "POINTS").astype(np.float64).reshape(n, 3)
        elif key in _CELL_SECTIONS:
            counts, flat = _cells(cur, words)
            n_cells += counts.size
            if key == "TRIANGLE_STRIPS" and counts.size:
                raise SurfaceError("VTK triangle strips are not supported")
            if key == "POLYGONS":
                polys.append(fan_triangulate(counts, flat))
        elif key in ("POINT_DATA", "CELL_DATA") and len(words) == 2:
            attribute_target = fields if key == "POINT_DATA" else {}
            target_n = _int(words[1], key)
            if key == "POINT_DATA" and (points is None or target_n != len(points)):
                raise SurfaceError("VTK POINT_DATA count differs from the number of POINTS")
        elif attribute_target is not None:
            _attribute(cur, words, target_n, attribute_target)
        else:
            raise SurfaceError(f"unexpected VTK line {' '.join(words)[:60]!r}")
    if points is None:
        raise SurfaceError("VTK file has no POINTS")
    faces = np.concatenate(polys) if polys else np.empty((0, 3), np.int64)
    if len(faces) == 0:
        raise SurfaceError("VTK file has no polygons (points or lines only, not a surface)")
    return points, faces, fields, f"vtk-{mode.decode().lower()}"


def write_vtk(fh, vertices, faces, fields: dict, *, binary: bool = True):
    """Write legacy VTK 4.2 POLYDATA; fields go to POINT_DATA (SCALARS, VECTORS or FIELD)."""
    n, m = len(vertices), len(faces)

    def block(arr, code):
        arr = np.asarray(arr)
        if binary:
            return arr.astype(">" + code).tobytes() + b"\n"
        buf = _io.StringIO()
        fmt = "%d" if code[0] in "iu" else ("%.9g" if code == "f4" else "%.17g")
        np.savetxt(buf, arr.astype(code).reshape(len(arr), -1), fmt=fmt)
        return buf.getvalue().encode("ascii")

    out = [f"# vtk DataFile Version 4.2\nsurfacekit surface\n{'BINARY' if binary else 'ASCII'}\n"
           f"DATASET POLYDATA\nPOINTS {n} double\n".encode(), block(vertices, "f8"),
           f"POLYGONS {m} {4 * m}\n".encode(),
           block(np.column_stack([np.full(m, 3), np.asarray(faces)]), "i4")]
    if fields:
        out.append(f"POINT_DATA {n}\n".encode())
    extra = []
    for name, arr in fields.items():
        if not FIELD_NAME.match(name):
            raise SurfaceError(f"field name {name!r} cannot be stored in VTK")
        a = np.asarray(arr)
        code, tname = ("i4", "int") if a.dtype.kind in "biu" else ("f4", "float")
        if a.ndim == 1:
            out += [f"SCALARS {name} {tname} 1\nLOOKUP_TABLE default\n".encode(), block(a, code)]
        elif a.shape[1] == 3:
            out += [f"VECTORS {name} {tname}\n".encode(), block(a, code)]
        else:
            extra.append((name, a, code, tname))
    if extra:
        out.append(f"FIELD FieldData {len(extra)}\n".encode())
        for name, a, code, tname in extra:
            out += [f"{name} {a.shape[1]} {n} {tname}\n".encode(), block(a, code)]
    fh.write(b"".join(out))
