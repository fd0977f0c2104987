"""Reading and writing surfaces and per-vertex fields.

Formats: PLY (ASCII/binary), OBJ, STL (ASCII/binary), OFF, legacy VTK polydata
(ASCII/binary), GIFTI surfaces (``.gii``, via nibabel) and NPZ (vertices, faces
and fields).  PLY, VTK, GIFTI and NPZ carry per-vertex fields inside the file;
OBJ, STL and OFF get a ``<file>.fields.npz`` sidecar.  Loading never unpickles,
follows external references or executes anything; every count is checked against
the file size before allocation; anything unreadable raises ``SurfaceError`` with
a one-line message that starts with the file name.  Every write goes to a
temporary file renamed into place, so a failed write leaves no partial file and
never clobbers an existing one.
"""
from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from ..mesh.surface import Surface, SurfaceError
from .gifti import gifti_bytes, read_gifti
from .npz import read_npz_arrays, read_npz_mesh, write_npz
from .parsing import FIELD_NAME
from .ply import read_ply, write_ply
from .simple import read_obj, read_off, read_stl, write_obj, write_off, write_stl
from .units import parse_units
from .vtk import read_vtk, write_vtk

MESH_SUFFIXES = (".ply", ".obj", ".stl", ".off", ".gii", ".vtk", ".npz")
_NATIVE_FIELDS = (".ply", ".vtk", ".gii", ".npz")
# Headers of files that are not meshes, to name the mistake instead of a parse error.
_MAGIC = [
    (b"\x89PNG\r\n\x1a\n", "a PNG image"), (b"\xff\xd8\xff", "a JPEG image"),
    (b"GIF8", "a GIF image"), (b"%PDF", "a PDF document"),
    (b"\x1f\x8b", "gzip-compressed data (decompress it first)"),
    (b"BZh", "bzip2-compressed data"), (b"\xfd7zXZ\x00", "xz-compressed data"),
    (b"\x28\xb5\x2f\xfd", "zstd-compressed data"), (b"PK\x03\x04", "a zip archive"),
    (b"\x93NUMPY", "a NumPy .npy array"), (b"\x80\x02", "a Python pickle (never loaded)"),
    (b"\x80\x03", "a Python pickle (never loaded)"), (b"\x80\x04", "a Python pickle (never loaded)"),
    (b"\x80\x05", "a Python pickle (never loaded)"),
]


@contextmanager
def atomic_path(path, suffix: str | None = None):
    """Yield a temporary path beside `path`; rename it into place only on success.

    On any exception the temporary file is removed and `path` is untouched.  The
    final file gets the usual permissions (0666 minus the umask).
    """
    path = Path(path)
    suffix = path.suffix if suffix is None else suffix
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=f"{suffix}.part", dir=path.parent or ".")
    os.close(fd)
    try:
        yield Path(tmp)
        os.chmod(tmp, 0o666 & ~_umask())
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def _umask() -> int:
    """The process umask, read without changing it (os.umask would race with other threads)."""
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except OSError:
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def sidecar_path(path) -> Path:
    """The ``.fields.npz`` file that holds per-vertex fields for OBJ, STL and OFF meshes."""
    path = Path(path)
    return path.with_name(path.name + ".fields.npz")


# ------------------------------------------------------------------------------ reading
def _read_bytes(path: Path) -> bytes:
    if not path.exists():
        raise SurfaceError(f"no such file: {path}")
    if path.is_dir():
        raise SurfaceError(f"{path} is a directory, not a mesh file")
    if not path.is_file():  # a FIFO or device would block or never end
        raise SurfaceError(f"{path} is not a regular file")
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise SurfaceError(f"cannot read {path}: {exc.strerror or exc}") from None
    if not data.strip():
        raise SurfaceError(f"{path.name}: empty file")
    return data


def _sniff(data: bytes, kind: str) -> None:
    """Refuse files whose leading bytes say they are something else."""
    article = "an" if kind[0] in "AEFHILMNORSX" else "a"  # as the letters are spoken
    for magic, what in _MAGIC:
        if data.startswith(magic):
            raise SurfaceError(f"file is {what}, not {article} {kind} mesh")
    if len(data) > 348 and data[344:348] in (b"n+1\x00", b"ni1\x00"):
        raise SurfaceError(f"file is a NIfTI volume, not {article} {kind} mesh (use from_segmentation)")


_READERS = {".ply": read_ply, ".obj": read_obj, ".stl": read_stl, ".off": read_off,
            ".vtk": read_vtk, ".gii": read_gifti}
_PARSE_ERRORS = (ValueError, IndexError, KeyError, OverflowError, UnicodeDecodeError)


def _align_sidecar(vertices: np.ndarray, side: dict) -> dict:
    """Fields from a sidecar, reordered to the loaded vertices (STL welding reorders them)."""
    stored = side.get("vertices")
    fields = {k[len("fields/"):]: v for k, v in side.items() if k.startswith("fields/")}
    if stored is None or stored.ndim != 2 or stored.shape[1:] != (3,):
        raise SurfaceError("sidecar lacks the vertices it was written for")
    if stored.shape == vertices.shape and np.array_equal(stored, vertices):
        return fields
    from scipy.spatial import cKDTree

    dist, idx = cKDTree(stored).query(vertices)
    scale = float(np.abs(vertices).max()) + 1.0
    if not np.all(dist <= 4 * np.finfo(np.float32).eps * scale):
        raise SurfaceError("sidecar fields do not match the mesh vertices")
    return {k: np.asarray(v)[idx] for k, v in fields.items()}


def load_with_fields(path, units="mm") -> tuple[Surface, dict]:
    """Read a surface and its per-vertex fields.

    Parameters
    ----------
    path : str or Path
        A ``.ply .obj .stl .off .gii .vtk .npz`` file.
    units : "mm" (default), "cm", "m", or the size in mm of one file unit (e.g. the
        voxel size of a surface stored in voxel units).  The vertices are scaled
        to millimetres; per-vertex fields are returned as stored.

    Returns
    -------
    (Surface, dict)
        The surface in mm (``metadata["source"]`` is the path, ``metadata["format"]``
        the format read, ``metadata["units"]`` the unit of the file and
        ``metadata["mm_per_unit"]`` the factor applied) and
        ``{name: (n,) or (n, k) array}``.

    Raises
    ------
    SurfaceError
        Missing, empty, truncated, mislabelled or malformed files; non-finite
        coordinates; face indices out of range; no faces; only degenerate faces;
        unknown units.
    """
    path = Path(path)
    unit_name, scale = parse_units(units)
    suffix = path.suffix.lower()
    if suffix not in MESH_SUFFIXES:
        raise SurfaceError(f"unsupported mesh format {suffix or '(none)'!r} for {path.name} "
                           f"(supported: {' '.join(MESH_SUFFIXES)})")
    data = _read_bytes(path)
    kind = {".gii": "GIFTI"}.get(suffix, suffix[1:].upper())
    try:
        if suffix == ".npz":
            if not data.startswith(b"PK"):
                _sniff(data, kind)
                raise SurfaceError("not an NPZ (zip) archive")
            vertices, faces, fields, fmt = read_npz_mesh(path)
        else:
            exact_stl = suffix == ".stl" and len(data) >= 84 and \
                len(data) == 84 + 50 * int(np.frombuffer(data, "<u4", 1, 80)[0])
            if not exact_stl:
                _sniff(data, kind)
            vertices, faces, fields, fmt = _READERS[suffix](data)
        surface = Surface(vertices, faces, metadata={"source": str(path), "format": fmt})
    except SurfaceError as exc:
        raise SurfaceError(f"{path.name}: {exc}") from None
    except _PARSE_ERRORS as exc:
        raise SurfaceError(f"{path.name}: cannot parse as {kind}: "
                           f"{type(exc).__name__}: {str(exc)[:80]}") from None
    area = surface.face_areas
    diag = float(np.linalg.norm(surface.bounds[1] - surface.bounds[0]))
    if not np.any(area > 1e-12 * diag * diag):
        raise SurfaceError(f"{path.name}: only degenerate faces (all {surface.n_faces} have zero area)")
    side = sidecar_path(path)
    try:
        if suffix not in _NATIVE_FIELDS and side.is_file():
            try:
                arrays = read_npz_arrays(side)
            except SurfaceError as exc:
                raise SurfaceError(f"sidecar {side.name}: {exc}") from None
            fields = _align_sidecar(surface.vertices, arrays)
        fields = validate_fields(fields, surface.n_vertices)
    except SurfaceError as exc:
        raise SurfaceError(f"{path.name}: {exc}") from None
    meta = {**surface.metadata, "units": unit_name, "mm_per_unit": scale}
    if scale == 1.0:
        surface.metadata = meta
        return surface, fields
    vertices = surface.vertices * scale
    if not np.all(np.isfinite(vertices)):
        raise SurfaceError(f"{path.name}: coordinates overflow when scaled by {scale:g} to mm")
    return surface.copy_with(vertices=vertices, metadata=meta), fields


def load(path, units="mm") -> Surface:
    """Read a surface mesh (.ply .obj .stl .off .gii .vtk .npz) in `units` (mm, cm, m or mm
    per file unit), scaled to millimetres; unreadable input raises SurfaceError."""
    return load_with_fields(path, units)[0]


# ------------------------------------------------------------------------------ writing
def validate_fields(fields: dict | None, n: int) -> dict:
    """Check per-vertex fields: names are identifiers, arrays numeric with n rows, 1-D or 2-D."""
    out = {}
    for name, arr in (fields or {}).items():
        if not isinstance(name, str) or not FIELD_NAME.match(name) or name in ("x", "y", "z"):
            raise SurfaceError(f"bad field name {name!r} (letters, digits, _ . -; not x/y/z)")
        a = np.asarray(arr)
        if a.dtype.kind not in "biuf":
            raise SurfaceError(f"field {name!r} must be numeric, got dtype {a.dtype}")
        if a.ndim not in (1, 2) or len(a) != n or (a.ndim == 2 and a.shape[1] == 0):
            raise SurfaceError(f"field {name!r} has shape {a.shape}; expected ({n},) or ({n}, k)")
        out[name] = a
    return out


def _check_int32(fields: dict, fmt: str) -> None:
    for name, a in fields.items():
        if a.dtype.kind in "iu" and a.size and (a.min() < -2**31 or a.max() >= 2**31):
            raise SurfaceError(f"integer field {name!r} does not fit the int32 that {fmt} stores")


def save(surface: Surface, path, fields: dict | None = None, *, binary: bool = True) -> Path:
    """Write a surface (.ply .obj .stl .off .gii .vtk .npz) and per-vertex fields, atomically.

    Fields travel as PLY vertex properties (float32 / int32), VTK POINT_DATA,
    GIFTI data arrays, NPZ arrays (exact), or a ``<file>.fields.npz`` sidecar for
    OBJ, STL and OFF.  `binary` chooses binary PLY, STL and VTK (ASCII otherwise).
    Saving OBJ/STL/OFF without fields removes a stale sidecar of the same name.
    """
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in MESH_SUFFIXES:
        raise SurfaceError(f"unsupported mesh format {suffix or '(none)'!r} for {path.name} "
                           f"(supported: {' '.join(MESH_SUFFIXES)})")
    if not path.parent.is_dir():
        raise SurfaceError(f"folder does not exist: {path.parent}")
    if path.is_dir():
        raise SurfaceError(f"{path} is a directory")
    fields = validate_fields(fields, surface.n_vertices)
    v, f = surface.vertices, surface.faces
    if suffix in (".ply", ".vtk", ".gii"):
        _check_int32(fields, suffix[1:].upper())
    with atomic_path(path) as tmp, open(tmp, "wb") as fh:
        if suffix == ".ply":
            write_ply(fh, v, f, fields, binary=binary)
        elif suffix == ".vtk":
            write_vtk(fh, v, f, fields, binary=binary)
        elif suffix == ".gii":
            fh.write(gifti_bytes(surface, fields))
        elif suffix == ".npz":
            write_npz(fh, {"vertices": v, "faces": f, **{f"fields/{k}": a for k, a in fields.items()}})
        elif suffix == ".stl":
            write_stl(fh, v, f, binary=binary, normals=surface.face_normals)
        elif suffix == ".obj":
            write_obj(fh, v, f)
        else:
            write_off(fh, v, f)
    if suffix not in _NATIVE_FIELDS:
        side = sidecar_path(path)
        if fields:
            save_fields(side, vertices=v, **{f"fields/{k}": a for k, a in fields.items()})
        elif side.is_file():
            side.unlink()
    return path


def save_fields(path, **arrays) -> Path:
    """Write named arrays to an NPZ file atomically and reproducibly (see :func:`write_npz`)."""
    path = Path(path)
    with atomic_path(path, suffix=".npz") as tmp, open(tmp, "wb") as fh:
        write_npz(fh, arrays)
    return path


def load_fields(path) -> dict:
    """Read arrays from an NPZ file without unpickling; bad files raise SurfaceError."""
    path = Path(path)
    if not path.is_file():
        raise SurfaceError(f"no such file: {path}")
    try:
        return read_npz_arrays(path)
    except SurfaceError as exc:
        raise SurfaceError(f"{path.name}: {exc}") from None
