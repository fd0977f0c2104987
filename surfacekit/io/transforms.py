"""ITK transform files and vector images, written and read through SimpleITK, in RAS mm.

SimpleITK (the optional ``itk`` extra) reads and writes the transform files of
the ITK toolkit: text ``.tfm``/``.txt``, HDF5 ``.h5``/``.hdf5`` and MATLAB ``.mat``
(ITK Software Guide, "Transforms" chapter, transform I/O).  ITK works in LPS
millimetres; surfacekit in RAS (:mod:`surfacekit.io.images`).  A linear map
``x -> A x + b`` in RAS is ``F A F`` and ``F b`` in LPS with ``F = diag(-1, -1, 1)``
(F is its own inverse), so rotations stay rotations and scales stay scales.

ITK transforms, as used by image resampling, map points of the **fixed** (output)
image's space to the **moving** (input) image's space; :func:`transform_file_points`
applies them that way.  Every write is atomic: staged beside the destination
under the destination's own suffix (SimpleITK picks the format by suffix), then
renamed into place, so a failed write leaves nothing behind.
"""
from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from ..mesh.surface import SurfaceError
from .files import atomic_path
from .images import ITK_SUFFIXES, LPS_TO_RAS, NIFTI_SUFFIXES, is_sitk_image, require_simpleitk

TRANSFORM_SUFFIXES = (".tfm", ".txt", ".h5", ".hdf5", ".mat")
#: formats a displacement-field image is written in (single-file formats only)
FIELD_SUFFIXES = (".nii", ".nii.gz", ".nrrd", ".mha")
#: transform kinds that can be written, and the ITK transform each becomes
KINDS = ("rigid", "similarity", "affine")


def suffix_of(path: Path, suffixes: tuple) -> str | None:
    """The suffix of `suffixes` that `path` ends with (case-insensitive), or None."""
    name = path.name.lower()
    return next((s for s in sorted(suffixes, key=len, reverse=True) if name.endswith(s)), None)


def check_kind(kind: str) -> str:
    """`kind` when it is one of :data:`KINDS`; a one-line ValueError otherwise."""
    if kind not in KINDS:
        raise ValueError(f"kind must be one of {', '.join(KINDS)}, got {kind!r}")
    return kind


def _check_suffix(path, suffixes: tuple, what: str) -> Path:
    path = Path(path)
    if suffix_of(path, suffixes) is None:
        raise SurfaceError(f"{what} {path.name} must end with one of {', '.join(suffixes)}")
    return path


def check_transform_path(path) -> Path:
    """`path` when its suffix is a transform-file format SimpleITK writes; a SurfaceError otherwise."""
    return _check_suffix(path, TRANSFORM_SUFFIXES, "transform file")


def check_field_path(path) -> Path:
    """`path` when its suffix is an image format a displacement field is written in."""
    return _check_suffix(path, FIELD_SUFFIXES, "displacement-field file")


def write_atomic(path, write: Callable[[str], None]) -> Path:
    """Call ``write(staging_path)`` with a staging file of `path`'s own suffix, then rename.

    Builds on :func:`surfacekit.io.files.atomic_path`; the staging file keeps the
    real suffix because SimpleITK chooses the format from it.
    """
    path = Path(path)
    suffix = suffix_of(path, TRANSFORM_SUFFIXES + NIFTI_SUFFIXES + ITK_SUFFIXES) or path.suffix
    with atomic_path(path, suffix="") as tmp:
        staged = tmp.with_name(tmp.name[: -len(".part")] + suffix)
        try:
            write(str(staged))
            os.replace(staged, tmp)
        finally:
            if staged.exists():
                staged.unlink()
    return path


def ras_to_lps_matrix(matrix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(3, 3) linear part and (3,) translation in LPS of a (4, 4) RAS homogeneous matrix."""
    m = np.asarray(matrix, dtype=np.float64)
    return LPS_TO_RAS @ m[:3, :3] @ LPS_TO_RAS, LPS_TO_RAS @ m[:3, 3]


def itk_transform(matrix: np.ndarray, kind: str):
    """A SimpleITK transform of `kind` equal to the (4, 4) RAS matrix `matrix` (mm).

    rigid -> ``Euler3DTransform``, similarity -> ``Similarity3DTransform``, affine ->
    ``AffineTransform``; the centre of rotation is the origin.  A matrix that is not
    of the kind (a rigid kind with a scale, a similarity with shear) is a SurfaceError.
    """
    sitk = require_simpleitk("writing a transform file")
    linear, translation = ras_to_lps_matrix(matrix)
    builders = {"rigid": sitk.Euler3DTransform, "similarity": sitk.Similarity3DTransform,
                "affine": lambda: sitk.AffineTransform(3)}
    tx = builders[check_kind(kind)]()
    try:
        tx.SetMatrix(tuple(linear.ravel()))
    except RuntimeError:
        raise SurfaceError(f"the transform is not {kind}: its matrix has shear or scale a "
                           f"{kind} transform cannot hold (save it as kind='affine')") from None
    tx.SetTranslation(tuple(translation))
    return tx


def write_transform(path, matrix: np.ndarray, kind: str) -> Path:
    """Write the (4, 4) RAS matrix as an ITK transform file of `kind` (atomically)."""
    path = check_transform_path(path)
    tx = itk_transform(matrix, kind)
    sitk = require_simpleitk("writing a transform file")
    return write_atomic(path, lambda staged: sitk.WriteTransform(tx, staged))


def _read(path, what: str, read: Callable[[str], Any]):
    """``read(path)`` through SimpleITK; a one-line SurfaceError when missing or unreadable."""
    path = Path(path)
    if not path.is_file():
        raise SurfaceError(f"no such {what}: {path}")
    require_simpleitk(f"reading {path.name}")
    try:
        return read(str(path))
    except RuntimeError as exc:
        first = next((ln for ln in str(exc).splitlines() if ln.strip()), "unreadable")
        raise SurfaceError(f"cannot read {what} {path.name}: {first.strip()[:200]}") from None


def read_transform(path):
    """A SimpleITK transform read from an ITK transform file; one-line SurfaceError if unreadable."""
    return _read(path, "transform file", lambda p: require_simpleitk("").ReadTransform(p))


def is_sitk_transform(obj: Any) -> bool:
    """True for a SimpleITK transform object (checked without importing SimpleITK)."""
    return (type(obj).__module__.startswith("SimpleITK")
            and callable(getattr(obj, "TransformPoint", None)))


def linear_part(tx) -> np.ndarray | None:
    """The (4, 4) RAS matrix of a linear SimpleITK transform, or None if it is not linear.

    Read off by mapping the origin and the three unit points, which is exact for
    any transform ITK reports as linear (affine in the point coordinates).
    """
    if not tx.IsLinear():
        return None
    base = np.array(tx.TransformPoint((0.0, 0.0, 0.0)))
    cols = [np.array(tx.TransformPoint(tuple(e))) - base for e in np.eye(3)]
    m = np.eye(4)
    m[:3, :3] = LPS_TO_RAS @ np.column_stack(cols) @ LPS_TO_RAS
    m[:3, 3] = LPS_TO_RAS @ base
    return m


def transform_file_points(tx, points_ras: np.ndarray) -> np.ndarray:
    """Map (n, 3) RAS points (mm) through a SimpleITK transform, as ITK maps points.

    Linear transforms are applied as one matrix; any other (displacement fields,
    B-splines, composites) point by point through ``TransformPoint`` in LPS.
    """
    p = np.asarray(points_ras, dtype=np.float64)
    m = linear_part(tx)
    if m is not None:
        return p @ m[:3, :3].T + m[:3, 3]
    lps = p @ LPS_TO_RAS
    out = np.array([tx.TransformPoint(tuple(q)) for q in lps.tolist()], dtype=np.float64)
    return out.reshape(-1, 3) @ LPS_TO_RAS


def field_transform(image):
    """A SimpleITK ``DisplacementFieldTransform`` made from a copy of a vector image (LPS mm)."""
    sitk = require_simpleitk("a displacement field")
    if not is_sitk_image(image):
        raise SurfaceError(f"expected a SimpleITK vector image, got {type(image).__name__}")
    if image.GetDimension() != 3 or image.GetNumberOfComponentsPerPixel() != 3:
        raise SurfaceError("a displacement field must be a 3-D image with 3 components per "
                           f"voxel, got {image.GetDimension()}-D with "
                           f"{image.GetNumberOfComponentsPerPixel()}")
    # the transform takes the image it is given over; give it a float64 copy
    return sitk.DisplacementFieldTransform(sitk.Cast(image, sitk.sitkVectorFloat64))


def read_field_image(path):
    """A displacement-field vector image read from `path` (one-line SurfaceError if unreadable)."""
    return _read(path, "displacement-field image", lambda p: require_simpleitk("").ReadImage(p))


def write_image(path, image) -> Path:
    """Write a SimpleITK image atomically (format from the suffix)."""
    sitk = require_simpleitk("writing an image")
    return write_atomic(path, lambda staged: sitk.WriteImage(image, staged))
