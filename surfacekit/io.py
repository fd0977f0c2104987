"""Reading and writing surfaces and per-vertex fields (minimal; extended by the I/O work)."""
from __future__ import annotations

import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from .surface import Surface, SurfaceError

MESH_SUFFIXES = (".ply", ".obj", ".stl", ".off")


@contextmanager
def atomic_path(path, suffix: str | None = None):
    """Yield a temporary path beside `path`; rename it into place only on success."""
    path = Path(path)
    suffix = path.suffix if suffix is None else suffix
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=f"{suffix}.part", dir=path.parent or ".")
    os.close(fd)
    try:
        yield Path(tmp)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def load(path) -> Surface:
    """Read a surface mesh (.ply .obj .stl .off); unreadable input raises SurfaceError."""
    import trimesh

    path = Path(path)
    if not path.is_file():
        raise SurfaceError(f"no such file: {path}")
    suffix = path.suffix.lower()
    if suffix not in MESH_SUFFIXES:
        raise SurfaceError(f"unsupported mesh format {suffix!r} for {path.name}")
    try:
        mesh = trimesh.load_mesh(str(path), process=False, file_type=suffix[1:])
    except Exception as exc:  # trimesh raises many types on corrupt files
        raise SurfaceError(f"cannot read {path.name} as {suffix[1:].upper()}: {exc}") from None
    return Surface(mesh.vertices, mesh.faces, metadata={"source": str(path)})


def save(surface: Surface, path, fields: dict | None = None) -> Path:
    """Write a surface (.ply .obj .stl .off), atomically."""
    path = Path(path)
    suffix = path.suffix.lower()
    if suffix not in MESH_SUFFIXES:
        raise SurfaceError(f"unsupported mesh format {suffix!r} for {path.name}")
    mesh = surface.to_trimesh()
    with atomic_path(path) as tmp:
        mesh.export(str(tmp), file_type=suffix[1:])
    return path


def save_fields(path, **arrays) -> Path:
    """Write named arrays to an NPZ file atomically."""
    path = Path(path)
    with atomic_path(path, suffix=".npz") as tmp:
        with open(tmp, "wb") as fh:
            np.savez_compressed(fh, **{k: np.asarray(v) for k, v in arrays.items()})
    return path


def load_fields(path) -> dict:
    """Read arrays from an NPZ file without unpickling."""
    with np.load(path, allow_pickle=False) as data:
        return {k: data[k] for k in data.files}
