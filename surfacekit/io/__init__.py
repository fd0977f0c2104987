"""The formats stage: mesh files (PLY, OBJ, STL, OFF, GIFTI, legacy VTK, NPZ) and per-vertex
fields, read and written atomically (a temporary file renamed into place)."""
from .files import (
    atomic_path,
    load,
    load_fields,
    load_with_fields,
    save,
    save_fields,
    sidecar_path,
    validate_fields,
)
from .npz import npz_member, write_npz
from .tables import RESEARCH_NOTE, format_value, json_default, write_csv, write_json

__all__ = ["RESEARCH_NOTE", "atomic_path", "format_value", "json_default", "load", "load_fields",
           "load_with_fields", "npz_member", "save", "save_fields", "sidecar_path",
           "validate_fields", "write_csv", "write_json", "write_npz"]
