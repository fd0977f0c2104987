"""Malformed mesh files, generated in code so every case is reviewable.

``corpus()`` returns ``(case id, file name, bytes or None, expected message part)``;
``None`` bytes mean a special path (a directory, a missing file).  Run this file to
print the table of input -> message:  ``python tests/malformed_corpus.py``.
"""
from __future__ import annotations

import gzip
import io
import pickle
import struct
import zipfile

import numpy as np

TET_V = "0 0 0\n1 0 0\n0 1 0\n0 0 1\n"
TET_F = "3 0 2 1\n3 0 1 3\n3 0 3 2\n3 1 2 3\n"
PNG = b"\x89PNG\r\n\x1a\n" + b"\x00\x00\x00\rIHDR" + bytes(200)
JPEG = b"\xff\xd8\xff\xe0\x00\x10JFIF\x00" + bytes(200)


def ply_ascii(vertices: str = TET_V, faces: str | None = TET_F, nv: int | None = None,
              nf: int | None = None) -> bytes:
    nv = vertices.count("\n") if nv is None else nv
    head = f"ply\nformat ascii 1.0\nelement vertex {nv}\nproperty float x\nproperty float y\nproperty float z\n"
    if faces is not None:
        nf = faces.count("\n") if nf is None else nf
        head += f"element face {nf}\nproperty list uchar int vertex_indices\n"
    return (head + "end_header\n" + vertices + (faces or "")).encode()


def ply_binary_huge() -> bytes:
    head = (b"ply\nformat binary_little_endian 1.0\nelement vertex 1000000000000\n"
            b"property float x\nproperty float y\nproperty float z\nelement face 4\n"
            b"property list uchar int vertex_indices\nend_header\n")
    return head + np.zeros(12, "<f4").tobytes()


def stl_binary(tris: np.ndarray) -> bytes:
    rec = np.zeros(len(tris), [("n", "<f4", (3,)), ("v", "<f4", (3, 3)), ("a", "<u2")])
    rec["v"] = tris
    return bytes(80) + struct.pack("<I", len(tris)) + rec.tobytes()


def tet_triangles() -> np.ndarray:
    v = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    return v[np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])]


def vtk_ascii(points: str = TET_V, polys: str = TET_F, n_points: int | None = None,
              dataset: str = "POLYDATA", cells: str = "POLYGONS") -> bytes:
    n_points = points.count("\n") if n_points is None else n_points
    n_cells = polys.count("\n")
    size = len(polys.split())
    return (f"# vtk DataFile Version 3.0\ntest\nASCII\nDATASET {dataset}\nPOINTS {n_points} float\n"
            f"{points}{cells} {n_cells} {size}\n{polys}").encode()


def gifti(*, external: bool = False, entity: bool = False, triangles: bool = True,
          huge: bool = False) -> bytes:
    coords = '<DataArray Intent="NIFTI_INTENT_POINTSET" DataType="NIFTI_TYPE_FLOAT32" ' \
             f'ArrayIndexingOrder="RowMajorOrder" Dimensionality="2" Dim0="{10**12 if huge else 3}" ' \
             'Dim1="3" Encoding="ASCII" Endian="LittleEndian" ExternalFileName="" ' \
             'ExternalFileOffset=""><Data>0 0 0 1 0 0 0 1 0</Data></DataArray>'
    if external:
        coords = coords.replace('Encoding="ASCII"', 'Encoding="ExternalFileBinary"').replace(
            'ExternalFileName=""', 'ExternalFileName="/etc/passwd"')
    tris = '<DataArray Intent="NIFTI_INTENT_TRIANGLE" DataType="NIFTI_TYPE_INT32" ' \
           'ArrayIndexingOrder="RowMajorOrder" Dimensionality="2" Dim0="1" Dim1="3" ' \
           'Encoding="ASCII" Endian="LittleEndian" ExternalFileName="" ExternalFileOffset="">' \
           '<Data>0 1 2</Data></DataArray>'
    dtd = '<!DOCTYPE GIFTI [<!ENTITY a "aaaaaaaaaa"><!ENTITY b "&a;&a;&a;&a;&a;&a;">]>' if entity else ""
    body = coords + (tris if triangles else "")
    n = 2 if triangles else 1
    return (f'<?xml version="1.0" encoding="UTF-8"?>{dtd}<GIFTI Version="1.0" NumberOfDataArrays="{n}">'
            f"{body}</GIFTI>").encode()


def npz(**arrays) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def npz_with_pickle() -> bytes:
    """An NPZ whose member is an object array: loading it with pickles allowed would run code."""
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        member = io.BytesIO()
        np.save(member, np.array([{"payload": "would be unpickled"}], dtype=object), allow_pickle=True)
        zf.writestr("vertices.npy", member.getvalue())
    return buf.getvalue()


def corpus() -> list[tuple[str, str, bytes | None, str]]:
    rng = np.random.default_rng(7)
    garbage = rng.integers(0, 256, 4000, dtype=np.uint8).tobytes()
    tris = tet_triangles()
    cases = [(f"empty {ext}", f"empty.{ext}", b"", "empty file")
             for ext in ("ply", "obj", "stl", "off", "gii", "vtk", "npz")]
    cases += [
        ("whitespace only", "blank.ply", b"\n \n\t\n", "empty file"),
        ("truncated binary STL", "cut.stl", stl_binary(tris)[:-20], "truncated binary STL"),
        ("PNG renamed .stl", "image.stl", PNG, "PNG image"),
        ("PNG renamed .ply", "image.ply", PNG, "PNG image"),
        ("JPEG renamed .ply", "photo.ply", JPEG, "JPEG image"),
        ("JPEG renamed .stl", "photo.stl", JPEG, "JPEG image"),
        ("gzip of garbage .ply", "packed.ply", gzip.compress(garbage), "gzip-compressed"),
        ("gzip of garbage .vtk", "packed.vtk", gzip.compress(garbage), "gzip-compressed"),
        ("NaN coordinate PLY", "nan.ply", ply_ascii(TET_V.replace("1 0 0", "nan 0 0")), "NaN vertex"),
        ("infinite coordinate PLY", "inf.ply", ply_ascii(TET_V.replace("1 0 0", "inf 0 0")), "infinite vertex"),
        ("1e400 coordinate OBJ", "over.obj", b"v 1e400 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n", "infinite vertex"),
        ("1e200 coordinate OFF", "big.off", b"OFF\n3 1 0\n1e200 0 0\n1 0 0\n0 1 0\n3 0 1 2\n", "overflow"),
        ("NaN in binary STL", "nan.stl", stl_binary(np.where(tris == 1, np.nan, tris)), "NaN vertex"),
        ("face index out of range PLY", "range.ply", ply_ascii(faces="3 0 1 99\n"), "face index 99 out of range"),
        ("negative face index PLY", "neg.ply", ply_ascii(faces="3 0 -1 2\n"), "negative face index"),
        ("OBJ face index 0", "zero.obj", b"v 0 0 0\nv 1 0 0\nv 0 1 0\nf 0 1 2\n", "index 0"),
        ("OBJ index out of range", "range.obj", b"v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 9\n", "out of range"),
        ("point-only PLY (no face element)", "points.ply", ply_ascii(faces=None), "no face element"),
        ("PLY with zero faces", "nofaces.ply", ply_ascii(faces="", nf=0), "no faces"),
        ("OBJ without faces", "points.obj", b"v 0 0 0\nv 1 0 0\nv 0 1 0\n", "no face"),
        ("OFF without faces", "points.off", b"OFF\n3 0 0\n0 0 0\n1 0 0\n0 1 0\n", "no faces"),
        ("only degenerate faces (collinear)", "flat.ply",
         ply_ascii("0 0 0\n1 0 0\n2 0 0\n", "3 0 1 2\n3 2 1 0\n"), "only degenerate faces"),
        ("only degenerate faces (repeated index)", "repeat.off",
         b"OFF\n3 2 0\n0 0 0\n1 0 0\n0 1 0\n3 0 0 1\n3 1 2 2\n", "only degenerate faces"),
        ("PLY ascii header claims 10^12 vertices", "huge.ply", ply_ascii(nv=10**12), "declares 1000000000000"),
        ("PLY binary header claims 10^12 vertices", "hugeb.ply", ply_binary_huge(), "declares 1000000000000"),
        ("OFF header claims 10^12 vertices", "huge.off", b"OFF\n1000000000000 1 0\n0 0 0\n3 0 0 0\n", "declares"),
        ("binary STL claims 4e9 triangles", "huge.stl", bytes(80) + struct.pack("<I", 4_000_000_000) + bytes(100),
         "truncated binary STL"),
        ("VTK POINTS claims 10^12", "huge.vtk", vtk_ascii(n_points=10**12), "declares"),
        ("VTK polygons name missing points", "missing.vtk", vtk_ascii(polys="3 0 1 7\n"), "out of range"),
        ("VTK unstructured grid", "grid.vtk", vtk_ascii(dataset="UNSTRUCTURED_GRID"), "only POLYDATA"),
        ("VTK triangle strips", "strip.vtk", vtk_ascii(polys="4 0 1 2 3\n", cells="TRIANGLE_STRIPS"), "strips"),
        ("VTK lines only", "lines.vtk", vtk_ascii(polys="2 0 1\n", cells="LINES"), "no polygons"),
        ("GIFTI without triangles", "func.gii", gifti(triangles=False), "NIFTI_INTENT_TRIANGLE"),
        ("GIFTI external data file", "ext.gii", gifti(external=True), "external files"),
        ("GIFTI entity expansion", "laughs.gii", gifti(entity=True), "entity"),
        ("GIFTI claims 10^12 points", "huge.gii", gifti(huge=True), "claim far more"),
        ("NPZ with pickled object array", "pickle.npz", npz_with_pickle(), "pickle; refused"),
        ("raw pickle renamed .npz", "raw.npz", pickle.dumps({"a": 1}, protocol=4), "Python pickle"),
        ("NPZ without mesh arrays", "other.npz", npz(a=np.zeros(3)), "lacks 'vertices'"),
        ("PLY unknown format", "fmt.ply", ply_ascii().replace(b"ascii", b"binary_middle_endian"), "unknown PLY format"),
        ("PLY without end_header", "nohead.ply", ply_ascii().replace(b"end_header", b"end_hedr"), "no end_header"),
        ("binary PLY truncated", "cutb.ply", None, "ends early"),
        ("a directory", "folder.ply", None, "is a directory"),
        ("a missing path", "absent.ply", None, "no such file"),
        ("unknown suffix", "mesh.xyz", ply_ascii(), "unsupported mesh format"),
    ]
    cases += [(f"random bytes .{ext}", f"random.{ext}", garbage, "")
              for ext in ("ply", "obj", "stl", "off", "gii", "vtk", "npz")]
    return cases


if __name__ == "__main__":  # print the table of input -> message
    import tempfile
    from pathlib import Path

    from test_malformed import materialise

    import surfacekit as sk

    with tempfile.TemporaryDirectory() as tmp:
        for case, name, data, _ in corpus():
            try:
                sk.load(materialise(Path(tmp), name, data))
                msg = "LOADED (not refused)"
            except sk.SurfaceError as exc:
                msg = str(exc)
            print(f"| {case} | {msg} |")
