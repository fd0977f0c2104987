"""NPZ archives: checked reading (no pickles, no decompression bombs) and reproducible writing.

Writing gives byte-identical files for equal arrays (fixed zip time stamps);
reading refuses object arrays and members claiming more data than the file can hold.
"""
from __future__ import annotations

import struct
import zipfile
import zlib
from pathlib import Path

import numpy as np

from ..mesh.surface import SurfaceError
from .parsing import EXPANSION_ALLOWANCE, MAX_EXPANSION


def check_npz(path: Path) -> None:
    """Refuse NPZ members holding objects (pickles) or claiming more data than the file can hold."""
    size = path.stat().st_size
    try:
        with zipfile.ZipFile(path) as zf:
            infos = zf.infolist()
            if sum(i.file_size for i in infos) > MAX_EXPANSION * size + EXPANSION_ALLOWANCE:
                raise SurfaceError("NPZ archive expands to far more data than it holds (refused)")
            for info in infos:
                with zf.open(info) as fh:
                    version = np.lib.format.read_magic(fh)
                    reader = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                              else np.lib.format.read_array_header_2_0)
                    shape, _, dtype = reader(fh)
                if dtype.hasobject:
                    raise SurfaceError(f"NPZ member {info.filename!r} holds Python objects "
                                       "(pickle; refused)")
                if int(np.prod(shape, dtype=np.float64)) * dtype.itemsize > info.file_size:
                    raise SurfaceError(f"NPZ member {info.filename!r} claims more data than it holds")
    except (zipfile.BadZipFile, zipfile.LargeZipFile, EOFError, NotImplementedError, OSError,
            struct.error, zlib.error) as exc:
        raise SurfaceError(f"not a readable NPZ (zip) archive: {str(exc)[:80]}") from None
    except ValueError as exc:
        if isinstance(exc, SurfaceError):
            raise
        raise SurfaceError(f"bad NPZ member: {str(exc)[:80]}") from None


def read_npz_arrays(path: Path) -> dict:
    """Every array of an NPZ file by member name, after :func:`check_npz`; never unpickles."""
    check_npz(path)
    try:
        with np.load(path, allow_pickle=False) as data:
            return {k: data[k] for k in data.files}
    except (ValueError, OSError, EOFError, zipfile.BadZipFile, zlib.error) as exc:
        raise SurfaceError(f"cannot read NPZ: {str(exc)[:80]}") from None


def read_npz_mesh(path: Path) -> tuple[np.ndarray, np.ndarray, dict, str]:
    """Vertices, faces, ``fields/<name>`` arrays and the format name of a surface saved as NPZ."""
    arrays = read_npz_arrays(path)
    if "vertices" not in arrays or "faces" not in arrays:
        raise SurfaceError("NPZ file lacks 'vertices' and 'faces' arrays")
    fields = {k[len("fields/"):]: v for k, v in arrays.items() if k.startswith("fields/")}
    return arrays["vertices"], arrays["faces"], fields, "npz"


def npz_member(zf, name: str):
    """A writable ``<name>.npy`` zip member with a fixed time stamp (reproducible bytes)."""
    info = zipfile.ZipInfo(f"{name}.npy", date_time=(1980, 1, 1, 0, 0, 0))
    info.compress_type = zipfile.ZIP_DEFLATED
    info.external_attr = 0o644 << 16
    return zf.open(info, "w", force_zip64=True)


def write_npz(fh, arrays: dict) -> None:
    """Write arrays as a compressed NPZ to a binary file object, reproducibly.

    Unlike ``numpy.savez_compressed`` the zip members carry a fixed time stamp (the
    zip epoch), so equal arrays give byte-identical files whenever they are written;
    object arrays are refused (``allow_pickle=False``).
    """
    with zipfile.ZipFile(fh, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for name, value in arrays.items():
            with npz_member(zf, name) as member:
                np.lib.format.write_array(member, np.asarray(value), allow_pickle=False)
