"""Image volumes and grids in surfacekit's one world frame: NIfTI, NRRD, MetaImage, SimpleITK.

World frame
-----------
surfacekit places every image-derived point in **RAS millimetres**: +x points to
the patient's Right, +y Anterior, +z Superior, the frame of a NIfTI file's
sform/qform affine (NIfTI-1 data format, header fields ``srow_x..z``, 2004).
ITK, and so SimpleITK, NRRD files read through it and MetaImage, works in **LPS**
(+x Left, +y Posterior, +z Superior; DICOM PS3.3 §C.7.6.2.1.1).  The two differ by
negating x and y, ``p_RAS = diag(-1, -1, 1) p_LPS``; mixing them up turns a result
by 180° about the long (z) axis.  Every image read here is converted to RAS on the
way in (:func:`itk_affine`), and every ITK file written is converted back to LPS on
the way out (:class:`ImageGrid`, :mod:`surfacekit.io.transforms`).

NIfTI files are read with nibabel (a core dependency), whose ``img.affine`` is the
RAS voxel-to-world matrix.  NRRD (``.nrrd``, ``.nhdr``) and MetaImage (``.mha``,
``.mhd``) files, and SimpleITK image objects, need the optional SimpleITK reader
(``pip install 'surfacekit[itk]'``).  NIfTI-1 stores its affine in 32-bit floats,
so an oblique grid stored as NIfTI and as NRRD may differ by about 1e-7 of the
coordinates (≈1e-5 mm at 100 mm); NRRD and MetaImage keep 64-bit text.
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..mesh.surface import SurfaceError

#: label-volume and image formats surfacekit reads (NIfTI through nibabel, the rest through SimpleITK)
NIFTI_SUFFIXES = (".nii", ".nii.gz")
ITK_SUFFIXES = (".nrrd", ".nhdr", ".mha", ".mhd")
VOLUME_SUFFIXES = NIFTI_SUFFIXES + ITK_SUFFIXES
#: negating x and y takes ITK's LPS to NIfTI's RAS and back (its own inverse)
LPS_TO_RAS = np.diag([-1.0, -1.0, 1.0])
#: the world frame stated in every output's provenance
WORLD_FRAME = ("RAS mm (+x right, +y anterior, +z superior, as a NIfTI sform); ITK/SimpleITK "
               "files are LPS mm, converted by negating x and y")
ITK_EXTRA = "pip install 'surfacekit[itk]'"


def require_simpleitk(what: str):
    """The SimpleITK module, or a one-line SurfaceError naming the extra that provides it."""
    try:
        import SimpleITK
    except ImportError:
        raise SurfaceError(f"{what} needs SimpleITK, which is not installed: "
                           f"{ITK_EXTRA}") from None
    return SimpleITK


def is_sitk_image(obj: Any) -> bool:
    """True for a SimpleITK image object (checked without importing SimpleITK)."""
    return type(obj).__name__ == "Image" and type(obj).__module__.startswith("SimpleITK")


def volume_kind(path: Path) -> str:
    """``"itk"`` for NRRD and MetaImage suffixes, else ``"nifti"`` (nibabel: NIfTI and the
    other formats nibabel reads)."""
    return "itk" if path.name.lower().endswith(ITK_SUFFIXES) else "nifti"


def itk_affine(origin, spacing, direction) -> np.ndarray:
    """(4, 4) voxel-index -> RAS mm matrix of an ITK image geometry (given in LPS).

    ITK maps index ``i`` to the LPS point ``origin + D diag(spacing) i`` (ITK
    Software Guide, "Image" section); negating x and y gives RAS.
    """
    d = np.asarray(direction, dtype=np.float64).reshape(3, 3)
    affine = np.eye(4)
    affine[:3, :3] = LPS_TO_RAS @ d @ np.diag(np.asarray(spacing, dtype=np.float64))
    affine[:3, 3] = LPS_TO_RAS @ np.asarray(origin, dtype=np.float64)
    return affine


def _sitk_affine(image) -> np.ndarray:
    if image.GetDimension() != 3:
        raise SurfaceError(f"image must be 3-D, got {image.GetDimension()}-D")
    return itk_affine(image.GetOrigin(), image.GetSpacing(), image.GetDirection())


def _read_itk(path: Path, header_only: bool):
    sitk = require_simpleitk(f"reading {path.name}")
    reader = sitk.ImageFileReader()
    reader.SetFileName(str(path))
    try:
        if header_only:
            reader.ReadImageInformation()
            return reader
        return reader.Execute()
    except RuntimeError as exc:
        first = next((ln for ln in str(exc).splitlines() if ln.strip()), "unreadable")
        raise SurfaceError(f"cannot read {path.name}: {first.strip()[:200]}") from None


def _existing(path: Path, what: str) -> Path:
    if not path.is_file():
        raise SurfaceError(f"no such {what}: {path}")
    return path


def read_label_volume(source: Any) -> tuple[Any, np.ndarray, str]:
    """(volume indexed ``[i, j, k]``, (4, 4) voxel -> RAS mm affine, provenance name).

    `source` is a path (NIfTI through nibabel, read slab by slab on demand; NRRD or
    MetaImage through SimpleITK) or a SimpleITK image.  Volumes with a trailing
    axis of length 1 are squeezed; anything else that is not 3-D is refused.
    """
    if is_sitk_image(source):
        image, name = source, "SimpleITK image"
    else:
        path = _existing(Path(source), "label volume")
        if volume_kind(path) == "nifti":
            import nibabel as nib

            try:
                # an open handle lets gzip read the slabs in one forward pass, not one per slab
                img = nib.funcs.squeeze_image(nib.load(str(path), keep_file_open=True))
            except Exception as exc:  # noqa: BLE001 - nibabel raises many types on bad files
                raise SurfaceError(f"cannot read {path.name} as NIfTI: {exc}") from None
            return img.dataobj, np.asarray(img.affine, dtype=np.float64), str(path)
        image, name = _read_itk(path, header_only=False), str(path)
    if image.GetNumberOfComponentsPerPixel() != 1:
        raise SurfaceError(f"label volume must have one value per voxel, {name} has "
                           f"{image.GetNumberOfComponentsPerPixel()}")
    sitk = require_simpleitk("reading a SimpleITK image")
    # SimpleITK arrays are [k, j, i]; the transposed view of the copy is [i, j, k]
    return sitk.GetArrayFromImage(image).transpose(2, 1, 0), _sitk_affine(image), name


@dataclass(frozen=True)
class ImageGrid:
    """The sampling grid of an image: size (3,) voxels and its (4, 4) voxel -> RAS mm affine."""

    size: tuple
    affine: np.ndarray
    name: str = "image"

    @classmethod
    def of(cls, reference: Any) -> ImageGrid:
        """The grid of an image path (header only), a SimpleITK image, or an ImageGrid.

        Raises a one-line SurfaceError for a missing or unreadable image.
        """
        if isinstance(reference, ImageGrid):
            return reference
        if is_sitk_image(reference):
            return cls(tuple(int(n) for n in reference.GetSize()), _sitk_affine(reference),
                       "SimpleITK image")
        if not isinstance(reference, (str, os.PathLike)):
            raise SurfaceError("reference must be an image path, a SimpleITK image or an "
                               f"ImageGrid, got {type(reference).__name__}")
        path = _existing(Path(reference), "reference image")
        if volume_kind(path) == "nifti":
            import nibabel as nib

            try:
                img = nib.funcs.squeeze_image(nib.load(str(path)))
                size, affine = tuple(int(n) for n in img.shape[:3]), np.asarray(img.affine, float)
            except Exception as exc:  # noqa: BLE001 - nibabel raises many types on bad files
                raise SurfaceError(f"cannot read reference image {path.name}: {exc}") from None
            if len(img.shape) < 3:
                raise SurfaceError(f"reference image {path.name} is not 3-D")
            return cls(size, affine, path.name)
        reader = _read_itk(path, header_only=True)
        if reader.GetDimension() != 3:
            raise SurfaceError(f"reference image {path.name} is {reader.GetDimension()}-D, not 3-D")
        return cls(tuple(int(n) for n in reader.GetSize()),
                   itk_affine(reader.GetOrigin(), reader.GetSpacing(), reader.GetDirection()),
                   path.name)

    @property
    def spacing(self) -> np.ndarray:
        """(3,) voxel sizes in mm."""
        return np.linalg.norm(self.affine[:3, :3], axis=0)

    def itk_geometry(self) -> tuple[tuple, tuple, tuple]:
        """(origin, spacing, direction) in ITK's LPS convention, direction row-major (9,)."""
        lps = LPS_TO_RAS @ self.affine[:3, :3]
        spacing = np.linalg.norm(lps, axis=0)
        return (tuple(LPS_TO_RAS @ self.affine[:3, 3]), tuple(spacing),
                tuple((lps / spacing).ravel()))

    def to_index(self, points_ras: np.ndarray) -> np.ndarray:
        """(n, 3) continuous voxel indices of (n, 3) RAS points (mm)."""
        inv = np.linalg.inv(self.affine)
        return np.asarray(points_ras, dtype=np.float64) @ inv[:3, :3].T + inv[:3, 3]

    def points(self, start: int, stop: int) -> np.ndarray:
        """RAS points (mm) of the voxels with flat ITK order numbers start..stop-1 (i fastest)."""
        flat = np.arange(start, stop)
        nx, ny = self.size[0], self.size[1]
        idx = np.stack([flat % nx, (flat // nx) % ny, flat // (nx * ny)], axis=1).astype(float)
        return idx @ self.affine[:3, :3].T + self.affine[:3, 3]

    def outside_mm(self, points_ras: np.ndarray) -> float:
        """How far (mm) the farthest point lies outside the image; 0 when all are inside.

        The image covers continuous voxel indices -0.5 to size - 0.5 on each axis
        (each voxel centre with its half voxel around it), as ITK's interpolators
        take it.
        """
        idx = self.to_index(points_ras)
        high = np.asarray(self.size, dtype=np.float64) - 0.5
        excess = np.maximum(-0.5 - idx, 0.0) + np.maximum(idx - high, 0.0)  # voxels, per axis
        return float(np.max(np.linalg.norm(excess * self.spacing, axis=1), initial=0.0))
