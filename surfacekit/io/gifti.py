"""GIFTI surfaces (``.gii``, read and written through nibabel) in the GIFTI Surface Data Format
1.0: a NIFTI_INTENT_POINTSET and a NIFTI_INTENT_TRIANGLE array; other per-vertex arrays are
fields."""
from __future__ import annotations

import io
import re

import numpy as np

from ..mesh.surface import Surface, SurfaceError
from .parsing import EXPANSION_ALLOWANCE, FIELD_NAME, MAX_EXPANSION


def read_gifti(data: bytes):
    """GIFTI surface: NIFTI_INTENT_POINTSET + NIFTI_INTENT_TRIANGLE; other arrays become fields."""
    import nibabel as nib

    # External DTDs are never fetched by expat; internal subsets could define entities.
    if re.search(rb"<!ENTITY|<!DOCTYPE[^>]*\[", data):
        raise SurfaceError("GIFTI XML with entity declarations is refused")
    if b"ExternalFileBinary" in data:
        raise SurfaceError("GIFTI arrays stored in external files are not followed")
    declared = 0
    for tag in re.findall(rb"<DataArray\b[^>]*>", data):
        dims = [int(d) for d in re.findall(rb'\bDim\d\s*=\s*"(\d{1,15})"', tag)]
        declared += int(np.prod(dims, dtype=np.float64)) * 8
    if declared > MAX_EXPANSION * len(data) + EXPANSION_ALLOWANCE:
        raise SurfaceError("GIFTI arrays claim far more data than the file holds (refused)")
    try:
        # nibabel's default 35 MB expat buffer would dominate the memory of small files.
        file_map = nib.gifti.GiftiImage.make_file_map({"image": io.BytesIO(data)})
        img = nib.gifti.GiftiImage.from_file_map(file_map, buffer_size=1 << 20)
        arrays = [(da.intent, nib.nifti1.intent_codes.label[da.intent], da.meta.get("Name"),
                   np.asarray(da.data)) for da in img.darrays]
    except MemoryError:
        raise
    except Exception as exc:  # noqa: BLE001  nibabel/expat raise many types on corrupt XML
        raise SurfaceError(f"cannot parse GIFTI: {type(exc).__name__}: {str(exc)[:80]}") from None
    points = [a for a in arrays if a[1] == "pointset"]
    tris = [a for a in arrays if a[1] == "triangle"]
    if not points:
        raise SurfaceError("GIFTI file has no NIFTI_INTENT_POINTSET array (not a surface)")
    if not tris:
        raise SurfaceError("GIFTI file has no NIFTI_INTENT_TRIANGLE array (point set only)")
    vertices, n = points[0][3], len(points[0][3])
    fields = {}
    for i, (_, label, name, arr) in enumerate(arrays):
        if label not in ("pointset", "triangle") and arr.ndim in (1, 2) and len(arr) == n:
            fields[name if name and FIELD_NAME.match(name) else f"array{i}"] = arr
    return vertices, tris[0][3], fields, "gifti"


def gifti_bytes(surface: Surface, fields: dict) -> bytes:
    from nibabel.gifti import GiftiDataArray, GiftiImage, GiftiMetaData

    img = GiftiImage()
    img.add_gifti_data_array(GiftiDataArray(surface.vertices.astype(np.float32),
                                            intent="NIFTI_INTENT_POINTSET", datatype="NIFTI_TYPE_FLOAT32"))
    img.add_gifti_data_array(GiftiDataArray(surface.faces.astype(np.int32),
                                            intent="NIFTI_INTENT_TRIANGLE", datatype="NIFTI_TYPE_INT32"))
    for name, a in fields.items():
        integer = a.dtype.kind in "biu"
        intent = "NIFTI_INTENT_LABEL" if integer else (
            "NIFTI_INTENT_VECTOR" if a.ndim == 2 and a.shape[1] == 3 else "NIFTI_INTENT_NONE")
        img.add_gifti_data_array(GiftiDataArray(
            a.astype(np.int32 if integer else np.float32), intent=intent,
            datatype="NIFTI_TYPE_INT32" if integer else "NIFTI_TYPE_FLOAT32",
            meta=GiftiMetaData({"Name": name})))
    return img.to_bytes()
