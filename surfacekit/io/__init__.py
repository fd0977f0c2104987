"""The formats stage: mesh files (PLY, OBJ, STL, OFF, GIFTI, legacy VTK, NPZ) and per-vertex
fields, read and written atomically (a temporary file renamed into place)."""
from .files import (
    atomic_path,
    load,
    load_fields,
    load_with_fields,
    npz_member,
    save,
    save_fields,
    sidecar_path,
    validate_fields,
    write_npz,
)

__all__ = ["atomic_path", "load", "load_fields", "load_with_fields", "npz_member", "save",
           "save_fields", "sidecar_path", "validate_fields", "write_npz"]
