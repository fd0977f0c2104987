"""PLY reading and writing (ASCII, binary little- and big-endian).

The parser takes the whole file as ``bytes`` and returns ``(vertices (n, 3) float64,
faces (m, 3) int64, fields dict, format name)``.  Every count read from a header is checked
against the bytes actually present before any array is allocated, so a header
claiming 10¹² vertices costs nothing.  Problems raise ``SurfaceError`` with a
one-line message; ``surfacekit.io`` adds the file name.

PLY layout: Greg Turk, "The PLY Polygon File Format", Stanford, 1994 (common
practice: one element row per line in ASCII files is assumed by nobody here; the
ASCII reader works on the token stream).
"""
from __future__ import annotations

import io as _io
import re

import numpy as np

from ..mesh.surface import SurfaceError
from .parsing import (
    as_integers,
    column_type,
    fan_triangulate,
    field_columns,
    group_fields,
    to_numbers,
)

# PLY scalar type names (both spellings of the specification) -> numpy dtype code
PLY_TYPES = {
    "char": "i1", "int8": "i1", "uchar": "u1", "uint8": "u1",
    "short": "i2", "int16": "i2", "ushort": "u2", "uint16": "u2",
    "int": "i4", "int32": "i4", "uint": "u4", "uint32": "u4",
    "float": "f4", "float32": "f4", "double": "f8", "float64": "f8",
}
_MAX_HEADER = 1 << 20


# ---------------------------------------------------------------------------- PLY reading
def _parse_ply_header(data: bytes):
    if not re.match(rb"ply[ \t]*\r?\n", data):
        raise SurfaceError("not a PLY file (missing 'ply' magic line)")
    m = re.search(rb"\nend_header[ \t]*\r?\n", data[:_MAX_HEADER])
    if m is None:
        raise SurfaceError("PLY header has no end_header line")
    try:
        lines = data[: m.start()].decode("ascii").splitlines()[1:]
    except UnicodeDecodeError:
        raise SurfaceError("PLY header is not ASCII text") from None
    fmt, elements, declared = None, [], None
    for line in lines:
        t = line.split()
        if t[:3] == ["comment", "written", "by"] and t[3:4] == ["surfacekit"]:
            declared = {} if declared is None else declared
        if t[:1] == ["comment"] and t[1:2] == ["surfacekit-field"] and len(t) == 4 and t[3].isdigit():
            declared = {} if declared is None else declared
            declared[t[2]] = int(t[3])
        if not t or t[0] in ("comment", "obj_info"):
            continue
        if t[0] == "format" and len(t) >= 2:
            fmt = t[1]
        elif t[0] == "element" and len(t) == 3:
            if not t[2].isdigit():
                raise SurfaceError(f"PLY element {t[1]!r} has a bad count {t[2]!r}")
            elements.append((t[1], int(t[2]), []))
        elif t[0] == "property" and elements:
            if len(t) == 3 and t[1] in PLY_TYPES:
                elements[-1][2].append((t[2], PLY_TYPES[t[1]], None))
            elif len(t) == 5 and t[1] == "list" and t[2] in PLY_TYPES and t[3] in PLY_TYPES:
                if PLY_TYPES[t[2]][0] == "f":
                    raise SurfaceError(f"PLY list count type {t[2]!r} is not an integer")
                elements[-1][2].append((t[4], PLY_TYPES[t[3]], PLY_TYPES[t[2]]))
            else:
                raise SurfaceError(f"bad PLY property line: {line.strip()[:60]!r}")
        else:
            raise SurfaceError(f"bad PLY header line: {line.strip()[:60]!r}")
    if fmt not in ("ascii", "binary_little_endian", "binary_big_endian"):
        raise SurfaceError(f"unknown PLY format {fmt!r}")
    return fmt, elements, m.end(), declared


def _empty_element(props):
    cols = {p[0]: np.empty(0, p[1]) for p in props if p[2] is None}
    lists = [(p[0], np.empty(0, np.int64), np.empty(0, np.int64)) for p in props if p[2] is not None]
    return cols, lists


def _ascii_element(tokens, pos, name, count, props):
    """Read one element from the token list; returns (columns, list_rows or None, new pos)."""
    if count == 0:
        return (*_empty_element(props), pos)
    n_tok = len(props)
    has_list = any(p[2] is not None for p in props)
    if not has_list:
        end = pos + count * n_tok
        if end > len(tokens):
            raise SurfaceError(f"PLY {name} data ends early ({count} declared)")
        vals = to_numbers(tokens[pos:end], np.float64, f"PLY {name} data").reshape(count, n_tok)
        return {p[0]: vals[:, i] for i, p in enumerate(props)}, None, end
    # Fast path: every list as long as in the first row (triangles).
    lengths, q = [], pos
    for p in props:
        if q >= len(tokens):
            raise SurfaceError(f"PLY {name} data ends early")
        if p[2] is None:
            q += 1
        else:
            ln = int(to_numbers(tokens[q:q + 1], np.int64, f"PLY {name} list count")[0])
            if ln < 0:
                raise SurfaceError(f"negative list length in PLY {name}")
            lengths.append(ln)
            q += 1 + ln
    row = q - pos
    end = pos + count * row
    if count and end <= len(tokens):
        vals = to_numbers(tokens[pos:end], np.float64, f"PLY {name} data").reshape(count, row)
        cols, lists, c, li = {}, [], 0, 0
        ok = True
        for p in props:
            if p[2] is None:
                cols[p[0]] = vals[:, c]
                c += 1
            else:
                ok &= bool(np.all(vals[:, c] == lengths[li]))
                lists.append((p[0], np.full(count, lengths[li]), vals[:, c + 1: c + 1 + lengths[li]]))
                c += 1 + lengths[li]
                li += 1
        if ok:
            return cols, [(nm, cn, v.ravel()) for nm, cn, v in lists], end
    # Irregular rows (mixed polygons): walk, bounded by the token count.  PLY data is all
    # numeric, so the rest of the body is converted once and the walk only indexes it.
    nums = to_numbers(tokens[pos:], np.float64, f"PLY {name} data")
    cols = {p[0]: np.empty(count) for p in props if p[2] is None}
    lists = {p[0]: ([], []) for p in props if p[2] is not None}
    q = 0
    for r in range(count):
        for p in props:
            if q >= nums.size:
                raise SurfaceError(f"PLY {name} data ends early at row {r} of {count}")
            if p[2] is None:
                cols[p[0]][r] = nums[q]
                q += 1
                continue
            ln = nums[q]
            if not (0 <= ln <= nums.size - q - 1) or ln != int(ln):
                raise SurfaceError(f"PLY {name} row {r} has a bad list length {ln}")
            lists[p[0]][0].append(int(ln))
            lists[p[0]][1].append(q + 1)
            q += 1 + int(ln)
    out_lists = []
    for nm, (lengths, starts) in lists.items():
        lengths = np.array(lengths, np.int64)
        offsets = np.arange(int(lengths.sum())) - np.repeat(np.cumsum(lengths) - lengths, lengths)
        out_lists.append((nm, lengths, nums[np.repeat(np.array(starts, np.int64), lengths) + offsets]))
    return cols, out_lists, pos + q


def _binary_element(data, pos, name, count, props, endian):
    """Read one binary element at byte offset `pos`; returns (columns, lists or None, new pos)."""
    if count == 0:
        return (*_empty_element(props), pos)
    remaining = len(data) - pos

    def row_dtype(lengths):
        fields, li = [], 0
        for i, p in enumerate(props):
            if p[2] is None:
                fields.append((f"s{i}", endian + p[1]))
            else:
                fields.append((f"c{i}", endian + p[2]))
                fields.append((f"l{i}", endian + p[1], (lengths[li],)))
                li += 1
        return np.dtype(fields)

    list_props = [i for i, p in enumerate(props) if p[2] is not None]
    lengths, q = [], pos
    for i, p in enumerate(props):  # sizes of the first row
        if p[2] is None:
            q += np.dtype(p[1]).itemsize
            continue
        size = np.dtype(p[2]).itemsize
        if q + size > len(data):
            raise SurfaceError(f"PLY {name} data ends early")
        ln = int(np.frombuffer(data, endian + p[2], 1, q)[0]) if count else 0
        if ln < 0 or ln > remaining:
            raise SurfaceError(f"PLY {name} list length {ln} is impossible")
        lengths.append(ln)
        q += size + ln * np.dtype(p[1]).itemsize
    dt = row_dtype(lengths)
    if count * dt.itemsize > remaining and not list_props:
        raise SurfaceError(f"PLY header declares {count} {name} rows ({count * dt.itemsize} "
                           f"bytes) but only {remaining} bytes follow")
    if count * dt.itemsize <= remaining:
        rec = np.frombuffer(data, dt, count, pos)
        if all(np.all(rec[f"c{i}"] == lengths[k]) for k, i in enumerate(list_props)):
            cols = {p[0]: rec[f"s{i}"].astype(p[1]) for i, p in enumerate(props) if p[2] is None}
            lists = [(props[i][0], np.full(count, lengths[k]), rec[f"l{i}"].ravel().astype(np.int64))
                     for k, i in enumerate(list_props)]
            return cols, (lists if list_props else None), pos + count * dt.itemsize
    if count > remaining:  # every row holds at least one byte
        raise SurfaceError(f"PLY header declares {count} {name} rows but only {remaining} bytes follow")
    cols = {p[0]: np.empty(count, p[1]) for p in props if p[2] is None}
    lists = {p[0]: ([], []) for p in props if p[2] is not None}
    for r in range(count):  # irregular rows; bounded by the byte count
        for p in props:
            size = np.dtype(p[1] if p[2] is None else p[2]).itemsize
            if pos + size > len(data):
                raise SurfaceError(f"PLY {name} data ends early at row {r} of {count}")
            v = np.frombuffer(data, endian + (p[1] if p[2] is None else p[2]), 1, pos)[0]
            pos += size
            if p[2] is None:
                cols[p[0]][r] = v
                continue
            ln, isz = int(v), np.dtype(p[1]).itemsize
            if ln < 0:
                raise SurfaceError(f"PLY {name} row {r} has a bad list length {ln}")
            if pos + ln * isz > len(data):
                raise SurfaceError(f"PLY {name} data ends early at row {r} of {count} (truncated?)")
            lists[p[0]][0].append(ln)
            lists[p[0]][1].append(np.frombuffer(data, endian + p[1], ln, pos))
            pos += ln * isz
    out = [(nm, np.array(cn, np.int64),
            np.concatenate(fl).astype(np.int64) if fl else np.empty(0, np.int64))
           for nm, (cn, fl) in lists.items()]
    return cols, out, pos


def read_ply(data: bytes):
    """Parse PLY (ASCII or binary) bytes -> (vertices, faces, fields, format name)."""
    fmt, elements, start, declared = _parse_ply_header(data)
    names = [e[0] for e in elements]
    if "vertex" not in names:
        raise SurfaceError("PLY file has no vertex element")
    if "face" not in names:
        raise SurfaceError("PLY file has no face element (point cloud, not a surface)")
    # Cheapest possible row: one token or byte per property; check before reading anything.
    if fmt == "ascii":
        tokens = data[start:].split()
        budget, unit = len(tokens), "values"
    else:
        budget, unit = len(data) - start, "bytes"
    for name, count, props in elements:
        if count * max(1, len(props)) > budget:
            raise SurfaceError(f"PLY header declares {count} {name} rows but the file holds "
                               f"only {budget} {unit} of data")
    pos = 0 if fmt == "ascii" else start
    endian = "<" if fmt == "binary_little_endian" else ">"
    vertex_cols, faces = None, None
    for name, count, props in elements:
        if fmt == "ascii":
            cols, lists, pos = _ascii_element(tokens, pos, name, count, props)
        else:
            cols, lists, pos = _binary_element(data, pos, name, count, props, endian)
        if name == "vertex" and vertex_cols is None:
            vertex_cols = {p[0]: (cols[p[0]].astype(p[1]) if p[1][0] == "f" else
                                  as_integers(cols[p[0]], p[1], f"PLY vertex property {p[0]}"))
                           for p in props if p[2] is None}
        elif name == "face" and faces is None:
            idx = [entry for entry in (lists or []) if entry[0] in ("vertex_indices", "vertex_index")]
            if not idx:
                raise SurfaceError("PLY face element has no vertex_indices list")
            _, counts, flat = idx[0]
            faces = fan_triangulate(counts, as_integers(flat, "i8", "PLY face indices"))
    missing = [a for a in "xyz" if a not in vertex_cols]
    if missing:
        raise SurfaceError(f"PLY vertex element lacks coordinate(s) {', '.join(missing)}")
    vertices = np.stack([vertex_cols.pop(a).astype(np.float64) for a in "xyz"], axis=1)
    return vertices, faces, group_fields(vertex_cols, declared), f"ply-{fmt}"


# ---------------------------------------------------------------------------- PLY writing
def write_ply(fh, vertices: np.ndarray, faces: np.ndarray, fields: dict, *, binary: bool = True):
    """Write PLY with coordinates as double and fields as vertex properties.

    Float fields are stored as ``float`` (float32), integer and boolean labels as
    ``int`` (int32); (n, 3) vectors as ``name_x/_y/_z``, (n, k) as ``name_0..``.
    """
    n, m = len(vertices), len(faces)
    cols = field_columns(fields, n)
    kinds = [column_type(a) for _, a in cols]
    header = ["ply", f"format {'binary_little_endian' if binary else 'ascii'} 1.0",
              "comment written by surfacekit"]
    header += [f"comment surfacekit-field {name} {np.shape(a)[1]}" for name, a in fields.items()
               if np.ndim(a) == 2 and np.shape(a)[1] > 1]
    header += [f"element vertex {n}",
              "property double x", "property double y", "property double z"]
    header += [f"property {k} {name}" for (name, _), k in zip(cols, kinds)]
    header += [f"element face {m}", "property list uchar int vertex_indices", "end_header", ""]
    fh.write("\n".join(header).encode("ascii"))
    typecode = {"int": "i4", "float": "f4"}
    if binary:
        vdt = np.dtype([(a, "<f8") for a in "xyz"] +
                       [(f"f{i}", "<" + typecode[k]) for i, k in enumerate(kinds)])
        rec = np.empty(n, vdt)
        for i, a in enumerate("xyz"):
            rec[a] = vertices[:, i]
        for i, (_, col) in enumerate(cols):
            rec[f"f{i}"] = col
        fh.write(rec.tobytes())
        fdt = np.dtype([("n", "u1"), ("v", "<i4", (3,))])
        frec = np.empty(m, fdt)
        frec["n"] = 3
        frec["v"] = faces
        fh.write(frec.tobytes())
        return
    buf = _io.StringIO()
    table = np.empty((n, 3 + len(cols)), dtype=object)
    table[:, :3] = vertices
    for i, (_, col) in enumerate(cols):
        table[:, 3 + i] = col.astype(np.int64) if kinds[i] == "int" else col.astype(np.float32)
    fmt = ["%.17g"] * 3 + ["%d" if k == "int" else "%.9g" for k in kinds]
    np.savetxt(buf, table, fmt=fmt)
    np.savetxt(buf, np.asarray(faces, np.int64), fmt="3 %d %d %d")
    fh.write(buf.getvalue().encode("ascii"))
