"""Mesh and field I/O: round trips, reference files and readers, atomic writes, security."""
from __future__ import annotations

import io as _io
import os
import struct
import zipfile

import nibabel as nib
import numpy as np
import pytest
import trimesh
from scipy.spatial import cKDTree

import surfacekit as sk
from surfacekit.io import load_with_fields, sidecar_path

FORMATS = [("ply", True), ("ply", False), ("vtk", True), ("vtk", False), ("gii", True),
           ("npz", True), ("obj", False), ("off", False), ("stl", True), ("stl", False)]
FLOAT32 = {"ply", "vtk", "gii"}  # formats that store float fields as float32


@pytest.fixture(scope="module")
def sphere():
    return sk.synthetic.icosphere(2)  # 162 vertices, 320 faces


@pytest.fixture(scope="module")
def fields(sphere):
    rng = np.random.default_rng(0)
    n = sphere.n_vertices
    return {"thickness": rng.normal(2.0, 0.5, n), "region": rng.integers(0, 7, n),
            "displacement": rng.normal(size=(n, 3)), "coeffs": rng.normal(size=(n, 4)),
            "mask": rng.random(n) > 0.5}


def _order(loaded, original):
    """Index of each loaded vertex in the original (STL welding reorders vertices)."""
    dist, idx = cKDTree(original.vertices).query(loaded.vertices)
    assert dist.max() < 1e-6
    return idx


@pytest.mark.parametrize("ext,binary", FORMATS, ids=[f"{e}-{'bin' if b else 'ascii'}" for e, b in FORMATS])
def test_round_trip_with_fields(tmp_path, sphere, fields, ext, binary):
    """Geometry and fields survive a save/load cycle.

    Float fields equal x.astype(float32) where the format stores float32 (IEEE 754
    binary32 round-to-nearest), exactly otherwise; integer labels always exactly.
    """
    path = tmp_path / f"organ.{ext}"
    sk.save(sphere, path, fields=fields, binary=binary)
    loaded, got = load_with_fields(path)
    assert loaded.metadata["source"] == str(path)
    assert loaded.n_vertices == sphere.n_vertices and loaded.n_faces == sphere.n_faces
    idx = _order(loaded, sphere)
    assert len(np.unique(idx)) == sphere.n_vertices
    # same triangles (as vertex sets of the original numbering, winding preserved)
    assert np.array_equal(idx[loaded.faces], sphere.faces)
    # GIFTI pointsets and binary STL hold float32; the text formats are written with 17 digits.
    coords_exact = ext != "gii" and (ext, binary) != ("stl", True)
    expected_v = sphere.vertices if coords_exact else sphere.vertices.astype(np.float32)
    np.testing.assert_array_equal(loaded.vertices, expected_v[idx])
    assert set(got) == set(fields)
    for name, value in fields.items():
        value = value[idx]
        if value.dtype.kind == "f" and ext in FLOAT32:
            np.testing.assert_array_equal(got[name], value.astype(np.float32))
        else:
            np.testing.assert_array_equal(got[name], value)
    assert not list(tmp_path.glob("*.part"))


def test_npz_keeps_dtypes_exactly(tmp_path, sphere, fields):
    path = tmp_path / "exact.npz"
    sk.save(sphere, path, fields=fields)
    _, got = load_with_fields(path)
    for name, value in fields.items():
        assert got[name].dtype == value.dtype


@pytest.mark.parametrize("ext,binary", [("ply", True), ("ply", False), ("obj", False),
                                        ("off", False), ("stl", True), ("stl", False)])
def test_trimesh_reads_our_files(tmp_path, sphere, ext, binary):
    """Reference reader: trimesh (independent parsers) sees the same mesh we wrote."""
    path = tmp_path / f"ref.{ext}"
    sk.save(sphere, path, binary=binary)
    mesh = trimesh.load_mesh(str(path), process=False)
    if ext == "stl":
        mesh.merge_vertices()
    assert len(mesh.faces) == sphere.n_faces
    assert np.isclose(mesh.area, sphere.area, rtol=1e-6)
    assert np.isclose(mesh.volume, sphere.volume, rtol=1e-6)


def test_trimesh_reads_ply_vertex_properties(tmp_path, sphere, fields):
    """Reference reader: trimesh's PLY parser finds our custom vertex properties."""
    path = tmp_path / "props.ply"
    sk.save(sphere, path, fields=fields)
    raw = trimesh.load_mesh(str(path), process=False).metadata["_ply_raw"]["vertex"]["data"]
    np.testing.assert_array_equal(raw["thickness"].ravel(), fields["thickness"].astype(np.float32))
    np.testing.assert_array_equal(raw["displacement_y"].ravel(),
                                  fields["displacement"][:, 1].astype(np.float32))
    np.testing.assert_array_equal(raw["region"].ravel(), fields["region"])


@pytest.mark.parametrize("ext,kw", [("ply", {"encoding": "binary"}), ("ply", {"encoding": "ascii"}),
                                    ("obj", {}), ("off", {}), ("stl", {}), ("stl_ascii", {})])
def test_we_read_trimesh_files(tmp_path, sphere, ext, kw):
    """Files written by an independent writer (trimesh) load with the same geometry."""
    data = trimesh.Trimesh(sphere.vertices, sphere.faces, process=False).export(file_type=ext, **kw)
    path = tmp_path / f"theirs.{ext.split('_')[0]}"
    path.write_bytes(data if isinstance(data, bytes) else data.encode())
    s = sk.load(path)
    assert (s.n_vertices, s.n_faces) == (sphere.n_vertices, sphere.n_faces)
    assert np.isclose(s.area, sphere.area, rtol=1e-6)


def test_nibabel_reads_our_gifti(tmp_path, sphere, fields):
    """Reference reader: nibabel's GIFTI loader finds POINTSET, TRIANGLE and named field arrays."""
    path = tmp_path / "lh.organ.surf.gii"
    sk.save(sphere, path, fields={"thickness": fields["thickness"]})
    img = nib.load(str(path))
    coords, faces = img.agg_data(("pointset", "triangle"))
    np.testing.assert_array_equal(faces, sphere.faces)
    np.testing.assert_allclose(coords, sphere.vertices, atol=1e-6)
    assert img.darrays[2].meta["Name"] == "thickness"


TURK_CUBE = b"""ply
format ascii 1.0
comment made by Greg Turk
comment this file is a cube
element vertex 8
property float x
property float y
property float z
element face 6
property list uchar int vertex_index
end_header
0 0 0
0 0 1
0 1 1
0 1 0
1 0 0
1 0 1
1 1 1
1 1 0
4 0 1 2 3
4 7 6 5 4
4 0 4 5 1
4 1 5 6 2
4 2 6 7 3
4 3 7 4 0
"""

TURK_CUBE_COLOURED = b"""ply
format ascii 1.0
comment author: Greg Turk
comment object: another cube
element vertex 8
property float x
property float y
property float z
property uchar red
property uchar green
property uchar blue
element face 7
property list uchar int vertex_index
element edge 5
property int vertex1
property int vertex2
property uchar red
property uchar green
property uchar blue
end_header
0 0 0 255 0 0
0 0 1 255 0 0
0 1 1 255 0 0
0 1 0 255 0 0
1 0 0 0 0 255
1 0 1 0 0 255
1 1 1 0 0 255
1 1 0 0 0 255
3 0 1 2
3 0 2 3
4 7 6 5 4
4 0 4 5 1
4 1 5 6 2
4 2 6 7 3
4 3 7 4 0
0 1 255 255 255
1 2 255 255 255
2 3 255 255 255
3 0 255 255 255
2 0 0 0 0
"""


@pytest.mark.parametrize("data", [TURK_CUBE, TURK_CUBE_COLOURED], ids=["cube", "coloured-cube"])
def test_ply_specification_examples(tmp_path, data):
    """The two example files of Turk's PLY description (1994; transcribed from memory).

    Quads are fan-triangulated; the unit cube has area 6 and volume 1 (analytic);
    the second file mixes triangles and quads and has an extra 'edge' element.
    """
    path = tmp_path / "cube.ply"
    path.write_bytes(data)
    s, got = load_with_fields(path)
    assert s.n_vertices == 8 and s.n_faces == 12
    assert s.is_closed and np.isclose(s.area, 6.0) and np.isclose(abs(s.signed_volume), 1.0)
    if data is TURK_CUBE_COLOURED:
        np.testing.assert_array_equal(got["red"], [255] * 4 + [0] * 4)


@pytest.mark.parametrize("binary", [True, False])
def test_ply_component_names_round_trip_exactly(tmp_path, sphere, binary):
    """Scalar fields named like components stay scalars; declared vectors come back (n, 3)."""
    n = sphere.n_vertices
    fields = {"shift_x": np.zeros(n), "shift_y": np.ones(n), "shift_z": np.full(n, 2.0),
              "flow": np.ones((n, 3)), "basis": np.ones((n, 2))}
    sk.save(sphere, tmp_path / "names.ply", fields=fields, binary=binary)
    got = load_with_fields(tmp_path / "names.ply")[1]
    assert {k: v.shape for k, v in got.items()} == {k: v.shape for k, v in fields.items()}


def test_foreign_ply_component_triplets_are_grouped(tmp_path):
    """Files from other writers: name_x/_y/_z properties become one (n, 3) field."""
    head = (b"ply\nformat ascii 1.0\nelement vertex 3\nproperty float x\nproperty float y\n"
            b"property float z\nproperty float flow_x\nproperty float flow_y\n"
            b"property float flow_z\nelement face 1\nproperty list uchar int vertex_indices\n"
            b"end_header\n")
    path = tmp_path / "foreign.ply"
    path.write_bytes(head + b"0 0 0 1 2 3\n1 0 0 1 2 3\n0 1 0 1 2 3\n3 0 1 2\n")
    got = load_with_fields(path)[1]
    np.testing.assert_array_equal(got["flow"], [[1, 2, 3]] * 3)


def test_big_endian_binary_ply(tmp_path):
    """Binary big-endian PLY with a uint count and float coordinates (layout per Turk 1994)."""
    head = (b"ply\nformat binary_big_endian 1.0\nelement vertex 4\nproperty float x\n"
            b"property float y\nproperty float z\nproperty short label\nelement face 4\n"
            b"property list uint int vertex_indices\nend_header\n")
    verts = [(0, 0, 0, -1), (1, 0, 0, 2), (0, 1, 0, 3), (0, 0, 1, 4)]
    body = b"".join(struct.pack(">fffh", *v) for v in verts)
    for f in [(0, 2, 1), (0, 1, 3), (0, 3, 2), (1, 2, 3)]:
        body += struct.pack(">Iiii", 3, *f)
    path = tmp_path / "be.ply"
    path.write_bytes(head + body)
    s, got = load_with_fields(path)
    assert np.isclose(s.volume, 1 / 6)  # right tetrahedron with unit legs: 1/6 (analytic)
    np.testing.assert_array_equal(got["label"], [-1, 2, 3, 4])


VTK_CUBE = b"""# vtk DataFile Version 2.0
Cube example
ASCII
DATASET POLYDATA
POINTS 8 float
0.0 0.0 0.0
1.0 0.0 0.0
1.0 1.0 0.0
0.0 1.0 0.0
0.0 0.0 1.0
1.0 0.0 1.0
1.0 1.0 1.0
0.0 1.0 1.0
POLYGONS 6 30
4 0 1 2 3
4 4 5 6 7
4 0 1 5 4
4 2 3 7 6
4 0 4 7 3
4 1 2 6 5
CELL_DATA 6
SCALARS cell_scalars int 1
LOOKUP_TABLE default
0
1
2
3
4
5
NORMALS cell_normals float
0 0 -1
0 0 1
0 -1 0
0 1 0
-1 0 0
1 0 0
FIELD FieldData 2
cellIds 1 6 int
0 1 2 3 4 5
faceAttributes 2 6 float
0.0 1.0 1.0 2.0 2.0 3.0 3.0 4.0 4.0 5.0 5.0 6.0
POINT_DATA 8
SCALARS sample_scalars float 1
LOOKUP_TABLE my_table
0.0
1.0
2.0
3.0
4.0
5.0
6.0
7.0
LOOKUP_TABLE my_table 8
0.0 0.0 0.0 1.0
1.0 0.0 0.0 1.0
0.0 1.0 0.0 1.0
1.0 1.0 0.0 1.0
0.0 0.0 1.0 1.0
1.0 0.0 1.0 1.0
0.0 1.0 1.0 1.0
1.0 1.0 1.0 1.0
"""


def test_vtk_file_format_cube_example(tmp_path):
    """The polydata cube of the VTK User's Guide, "VTK File Formats" (transcribed from memory).

    It has CELL_DATA (skipped), a FIELD block, a named lookup table and POINT_DATA.
    Unit cube: area 6, closed (analytic).
    """
    path = tmp_path / "cube.vtk"
    path.write_bytes(VTK_CUBE)
    s, got = load_with_fields(path)
    assert (s.n_vertices, s.n_faces) == (8, 12) and s.is_closed and np.isclose(s.area, 6.0)
    np.testing.assert_array_equal(got["sample_scalars"], np.arange(8, dtype=np.float32))
    assert set(got) == {"sample_scalars"}


def test_vtk_51_offsets_connectivity(tmp_path):
    """VTK 5.1 legacy layout: POLYGONS with OFFSETS/CONNECTIVITY arrays (VTK File Formats, 5.1)."""
    text = (b"# vtk DataFile Version 5.1\nvtk output\nASCII\nDATASET POLYDATA\n"
            b"POINTS 4 float\n0 0 0 1 0 0 0 1 0 0 0 1\n\nMETADATA\nINFORMATION 0\n\n"
            b"POLYGONS 5 12\nOFFSETS vtktypeint64\n0 3 6 9 12\nCONNECTIVITY vtktypeint64\n"
            b"0 2 1 0 1 3 0 3 2 1 2 3\n")
    path = tmp_path / "v51.vtk"
    path.write_bytes(text)
    s = sk.load(path)
    assert s.n_faces == 4 and np.isclose(s.volume, 1 / 6)


def test_binary_vtk_scalars_starting_with_whitespace_bytes(tmp_path):
    """Binary data right after a SCALARS line (no LOOKUP_TABLE) may begin with a byte that
    looks like whitespace (0x20, 0x0a); it must not be skipped.  Big-endian per the VTK
    File Formats guide."""
    values = np.frombuffer(b"\x20\x00\x00\x01\x0a\x00\x00\x02\x09\x00\x00\x03\x0d\x00\x00\x04",
                           ">f4")
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], ">f4")
    cells = np.array([[3, 0, 2, 1], [3, 0, 1, 3], [3, 0, 3, 2], [3, 1, 2, 3]], ">i4")
    data = (b"# vtk DataFile Version 3.0\nbin\nBINARY\nDATASET POLYDATA\nPOINTS 4 float\n"
            + pts.tobytes() + b"\nPOLYGONS 4 16\n" + cells.tobytes()
            + b"\nPOINT_DATA 4\nSCALARS w float 1\n" + values.tobytes() + b"\n")
    path = tmp_path / "ws.vtk"
    path.write_bytes(data)
    s, got = load_with_fields(path)
    assert np.isclose(s.volume, 1 / 6)
    np.testing.assert_array_equal(got["w"], values.astype(np.float32))


def test_obj_features(tmp_path):
    """OBJ with v/vt/vn face records, negative (relative) indices, a quad, comments and a
    material library that must not be opened (Wavefront OBJ layout, common practice)."""
    text = (b"# comment\nmtllib /nonexistent/materials.mtl\no cube\n"
            b"v 0 0 0\nv 1 0 0\nv 1 1 0\nv 0 1 0\nvt 0 0\nvn 0 0 1\n"
            b"usemtl skin\nf 1/1/1 4/1/1 3/1/1 2/1/1\nv 0.5 0.5 1\nf -5 -4 -1\nf -4 -3 -1\n"
            b"f -3 -2 -1\nf -2 -5 -1\n")
    path = tmp_path / "pyramid.obj"
    path.write_bytes(text)
    s = sk.load(path)
    assert (s.n_vertices, s.n_faces) == (5, 6)
    # square pyramid, base 1x1, height 1: volume 1/3 (analytic)
    assert s.is_closed and np.isclose(abs(s.signed_volume), 1 / 3)


def test_off_variants(tmp_path):
    """COFF with per-vertex colours, counts on the header line, comments (Geomview OFF)."""
    text = (b"COFF 4 4 6  # counts on the header line\n0 0 0 1 0 0 1\n1 0 0 1 0 0 1\n"
            b"0 1 0 1 0 0 1\n0 0 1 1 0 0 1\n3 0 2 1 255 0 0\n3 0 1 3\n3 0 3 2\n3 1 2 3\n")
    path = tmp_path / "tet.off"
    path.write_bytes(text)
    assert np.isclose(sk.load(path).volume, 1 / 6)


def _tet():
    return np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float), \
        np.array([[0, 2, 1], [0, 1, 3], [0, 3, 2], [1, 2, 3]])


FLAWED = {
    "two components": (np.vstack([_tet()[0], _tet()[0] + 5]), np.vstack([_tet()[1], _tet()[1] + 4])),
    "open boundary": (_tet()[0], _tet()[1][:3]),
    "non-manifold edge": (np.vstack([_tet()[0], [[1, 1, 1]]]), np.vstack([_tet()[1], [[1, 2, 4]]])),
    "flipped face": (_tet()[0], np.vstack([_tet()[1][:3], _tet()[1][3, ::-1]])),
}


@pytest.mark.parametrize("flaw", list(FLAWED))
@pytest.mark.parametrize("ext", ["ply", "obj", "off", "stl", "vtk", "gii", "npz"])
def test_flawed_but_valid_meshes_load(tmp_path, flaw, ext):
    """Valid files of flawed meshes load unchanged; Surface reports the flaw."""
    v, f = FLAWED[flaw]
    path = tmp_path / f"flawed.{ext}"
    sk.save(sk.Surface(v, f), path)
    s = sk.load(path)
    assert s.n_faces == len(f)
    if flaw == "two components":
        assert s.n_components == 2
    elif flaw == "open boundary":
        assert len(s.boundary_loops) == 1 and not s.is_closed
    elif flaw == "non-manifold edge":
        assert len(s.non_manifold_edges) == 1
    else:  # the flipped face makes its edges run the same way as their neighbours'
        directed = s.faces[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2)
        assert len(np.unique(directed, axis=0)) < len(directed)


def test_some_degenerate_faces_are_kept(tmp_path):
    """Only all-degenerate meshes are refused; a few zero-area faces load (Surface may hold them)."""
    v, f = _tet()
    path = tmp_path / "sliver.ply"
    sk.save(sk.Surface(v, np.vstack([f, [[0, 0, 1]]])), path)
    assert sk.load(path).n_faces == 5


def test_atomic_write_failure_keeps_existing_file(tmp_path, sphere, monkeypatch):
    """A writer that fails half way leaves the old file byte-identical and no temporary file."""
    path = tmp_path / "kept.ply"
    sk.save(sphere, path)
    before = path.read_bytes()

    def broken(fh, *args, **kwargs):
        fh.write(b"ply\nformat ascii 1.0\nelement vertex 99\n")
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(sk.io.files, "write_ply", broken)
    with pytest.raises(OSError, match="simulated"):
        sk.save(sphere, path)
    with pytest.raises(OSError, match="simulated"):
        sk.save(sphere, tmp_path / "new.ply")
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["kept.ply"]


def test_atomic_write_failure_at_rename(tmp_path, sphere, monkeypatch):
    path = tmp_path / "kept.obj"
    sk.save(sphere, path)
    before = path.read_bytes()

    def no_rename(src, dst):
        raise OSError("rename failed (simulated)")

    monkeypatch.setattr(os, "replace", no_rename)
    with pytest.raises(OSError, match="simulated"):
        sk.save(sphere, path)
    assert path.read_bytes() == before and sorted(p.name for p in tmp_path.iterdir()) == ["kept.obj"]


def test_written_files_get_normal_permissions(tmp_path, sphere):
    path = sk.save(sphere, tmp_path / "perm.ply")
    umask = os.umask(0)
    os.umask(umask)
    assert (path.stat().st_mode & 0o777) == (0o666 & ~umask)


class _Payload:
    """Unpickling this would create a marker file: proof of code execution."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (open, (str(self.marker), "w"))


def test_pickle_bearing_npz_is_refused_not_executed(tmp_path):
    marker = tmp_path / "executed"
    buf = _io.BytesIO()
    np.save(buf, np.array([_Payload(marker)], dtype=object), allow_pickle=True)
    for name in ("evil.npz", "evil.fields.npz"):
        with zipfile.ZipFile(tmp_path / name, "w") as zf:
            zf.writestr("vertices.npy", buf.getvalue())
            zf.writestr("faces.npy", buf.getvalue())
    with pytest.raises(sk.SurfaceError, match="pickle"):
        sk.load(tmp_path / "evil.npz")
    with pytest.raises(sk.SurfaceError, match="pickle"):
        sk.load_fields(tmp_path / "evil.fields.npz")
    host = tmp_path / "host.obj"  # a sidecar is read through the same refusal
    host.write_bytes(b"v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n")
    os.replace(tmp_path / "evil.fields.npz", sidecar_path(host))
    with pytest.raises(sk.SurfaceError, match="sidecar .*pickle"):
        load_with_fields(host)
    assert not marker.exists()


def test_paths_with_spaces_and_non_ascii(tmp_path, sphere, fields):
    folder = tmp_path / "Größe und Ω scans"
    folder.mkdir()
    for ext in ("ply", "stl", "gii", "vtk"):
        path = folder / f"foie gras é.{ext}"
        sk.save(sphere, path, fields={"thickness": fields["thickness"]})
        s, got = load_with_fields(path)
        assert s.metadata["source"] == str(path) and "thickness" in got


def test_sidecar_lifecycle(tmp_path, sphere, fields):
    path = tmp_path / "organ.obj"
    sk.save(sphere, path, fields={"thickness": fields["thickness"]})
    assert sidecar_path(path).is_file()
    sk.save(sphere, path)  # no fields now: the stale sidecar goes
    assert not sidecar_path(path).exists()
    assert load_with_fields(path)[1] == {}
    other = sk.synthetic.icosphere(1)
    sk.save(other, tmp_path / "other.obj", fields={"t": np.zeros(other.n_vertices)})
    os.replace(sidecar_path(tmp_path / "other.obj"), sidecar_path(path))
    with pytest.raises(sk.SurfaceError, match="sidecar"):
        load_with_fields(path)


@pytest.mark.parametrize("bad,match", [
    ({"t": np.zeros(5)}, "shape"), ({"x": np.zeros(162)}, "bad field name"),
    ({"has space": np.zeros(162)}, "bad field name"), ({"t": np.array(["a"] * 162)}, "numeric"),
    ({"t": np.zeros((162, 2, 2))}, "shape"),
])
def test_bad_fields_are_refused(tmp_path, sphere, bad, match):
    with pytest.raises(sk.SurfaceError, match=match):
        sk.save(sphere, tmp_path / "f.ply", fields=bad)
    assert not list(tmp_path.iterdir())


def test_int64_labels_beyond_int32(tmp_path, sphere):
    big = {"ids": np.arange(sphere.n_vertices, dtype=np.int64) + 2**40}
    with pytest.raises(sk.SurfaceError, match="int32"):
        sk.save(sphere, tmp_path / "ids.ply", fields=big)
    sk.save(sphere, tmp_path / "ids.npz", fields=big)
    np.testing.assert_array_equal(load_with_fields(tmp_path / "ids.npz")[1]["ids"], big["ids"])


def test_save_refuses_bad_targets(tmp_path, sphere):
    with pytest.raises(sk.SurfaceError, match="unsupported mesh format"):
        sk.save(sphere, tmp_path / "mesh.xyz")
    with pytest.raises(sk.SurfaceError, match="folder does not exist"):
        sk.save(sphere, tmp_path / "missing" / "mesh.ply")


@pytest.mark.timeout(20)
def test_fifo_is_refused_without_blocking(tmp_path):
    """Reading a named pipe would block forever; it is refused as not a regular file."""
    fifo = tmp_path / "pipe.ply"
    os.mkfifo(fifo)
    with pytest.raises(sk.SurfaceError, match="not a regular file"):
        sk.load(fifo)


@pytest.mark.parametrize("ext", ["ply", "vtk"])
def test_single_column_fields_come_back_flat(tmp_path, sphere, ext):
    column = np.arange(sphere.n_vertices, dtype=np.float64)[:, None]
    sk.save(sphere, tmp_path / f"c.{ext}", fields={"col": column})
    got = load_with_fields(tmp_path / f"c.{ext}")[1]
    np.testing.assert_array_equal(got["col"], column[:, 0])


def test_save_fields_load_fields(tmp_path):
    arrays = {"a": np.arange(5), "b": np.eye(3)}
    path = sk.save_fields(tmp_path / "arrays.npz", **arrays)
    got = sk.load_fields(path)
    assert set(got) == {"a", "b"} and np.array_equal(got["b"], arrays["b"])


def test_npz_outputs_are_byte_reproducible(tmp_path):
    """Equal arrays give equal NPZ bytes at different times (fixed zip time stamps), and
    numpy reads them back exactly (numpy's NPZ format: .npy members in a zip)."""
    import time

    a = {"x": np.arange(10.0), "labels": np.arange(5, dtype=np.int32)}
    sk.save_fields(tmp_path / "a.npz", **a)
    time.sleep(2.1)  # zip time stamps have 2-second resolution
    sk.save_fields(tmp_path / "b.npz", **a)
    assert (tmp_path / "a.npz").read_bytes() == (tmp_path / "b.npz").read_bytes()
    with np.load(tmp_path / "a.npz", allow_pickle=False) as back:
        assert np.array_equal(back["x"], a["x"]) and back["labels"].dtype == np.int32
    with pytest.raises(ValueError):
        sk.save_fields(tmp_path / "c.npz", bad=np.array([{"a": 1}], dtype=object))
    assert not (tmp_path / "c.npz").exists()
