"""Surface matches inside image-registration pipelines: transforms and displacement fields out,
image-registration results in.

Conventions (also in every output's provenance, :func:`registration_provenance`):

* World frame: RAS millimetres (NIfTI's sform frame); ITK/SimpleITK files are LPS
  and are converted on the way in and out (:mod:`surfacekit.io.images`).
* Direction: an image toolkit resamples the *moving* image onto the *fixed*
  image's grid with a transform that maps **fixed points to moving points**.  A
  correspondence runs source (baseline) -> target (follow-up); the files written
  here take the target (follow-up) as the fixed image by default, so they map
  follow-up points to baseline points and resample the baseline onto the
  follow-up grid.  ``fixed="source"`` writes the other direction.
* ``sk.transform_points`` with a Correspondence or a surfacekit Transform maps
  source -> target (surfacekit's direction); with an ITK transform file, object
  or displacement-field image it maps the way ITK does, fixed -> moving.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from ..correspondence.alignment import Transform
from ..correspondence.result import Correspondence
from ..io.images import VOLUME_SUFFIXES, WORLD_FRAME, ImageGrid, is_sitk_image, require_simpleitk
from ..io.transforms import (
    KINDS,
    TRANSFORM_SUFFIXES,
    check_kind,
    check_transform_path,
    field_transform,
    is_sitk_transform,
    read_field_image,
    read_transform,
    suffix_of,
    transform_file_points,
    write_transform,
)
from ..mesh.surface import Surface, SurfaceError
from .displacement import DEFAULT_CENTRES, correspondence_warp, surfaces_of

DIRECTION = {"target": "fixed = target (follow-up), moving = source (baseline): maps follow-up "
                       "points to baseline points",
             "source": "fixed = source (baseline), moving = target (follow-up): maps baseline "
                       "points to follow-up points"}


def registration_provenance(fixed: str = "target", kind: str | None = None) -> dict:
    """The conventions of a transform or field written here, for provenance records."""
    out = {"world_frame": WORLD_FRAME, "itk_files": "LPS mm",
           "direction": DIRECTION[_check_fixed(fixed)]}
    if kind is not None:
        out["kind"] = kind
    return out


def _check_fixed(fixed: str) -> str:
    if fixed not in DIRECTION:
        raise ValueError(f"fixed must be 'target' or 'source', got {fixed!r}")
    return fixed


def pose_matrix(corr: Correspondence, kind: str = "rigid") -> np.ndarray:
    """(4, 4) RAS matrix source -> target of the pose `corr` carries for `kind`."""
    check_kind(kind)
    if not isinstance(corr, Correspondence):
        raise SurfaceError(f"expected a Correspondence, got {type(corr).__name__}")
    pose = corr.affine if kind == "affine" else getattr(corr, kind)
    if pose is None:
        raise SurfaceError(f"the correspondence carries no {kind} transform (those made by "
                           "sk.match do)")
    return pose.matrix if isinstance(pose, Transform) else np.asarray(pose, dtype=np.float64)


def save_transform(corr, path, kind: str = "rigid", *, fixed: str = "target") -> Path:
    """Write the pose a match found as an ITK transform file SimpleITK reads.

    Parameters
    ----------
    corr : Correspondence source -> target from ``sk.match`` (or a Comparison)
    path : ``.tfm``/``.txt`` (text), ``.h5``/``.hdf5`` (HDF5) or ``.mat``
    kind : ``"rigid"`` (``corr.rigid``, written as an ``Euler3DTransform``),
        ``"similarity"`` (``corr.similarity``, ``Similarity3DTransform``) or
        ``"affine"`` (``corr.affine``, ``AffineTransform``)
    fixed : ``"target"`` (default): the file maps target (follow-up) points to
        source (baseline) points, the transform that resamples the baseline image
        onto the follow-up grid; ``"source"``: the inverse.

    The matrix is converted from RAS to LPS (ITK's frame); the centre of
    rotation is the origin.  Written atomically; needs SimpleITK
    (``pip install 'surfacekit[itk]'``).  Returns the path.
    """
    corr = corr if isinstance(corr, Correspondence) else surfaces_of(corr, None, None)[0]
    check_kind(kind)
    path = check_transform_path(path)
    matrix = pose_matrix(corr, kind)
    if _check_fixed(fixed) == "target":
        matrix = np.linalg.inv(matrix)
    return write_transform(path, matrix, kind)


def displacement_field(corr, reference, source: Surface | None = None,
                       target: Surface | None = None, *, fixed: str = "target",
                       centres: int = DEFAULT_CENTRES, seed: int = 0):
    """The correspondence as a displacement-field image on the grid of `reference`.

    Parameters
    ----------
    corr : Correspondence source -> target (give `source` and `target`), or the
        Comparison of ``sk.compare`` (surfaces and change analysis reused)
    reference : the fixed image: a path (NIfTI, NRRD, MetaImage; only its header
        is read), a SimpleITK image or an :class:`~surfacekit.io.images.ImageGrid`;
        its size, origin, spacing and direction become the field's
    fixed : which surface lies in the reference image: ``"target"`` (default,
        the follow-up) or ``"source"``
    centres : biharmonic spline centres (more: closer fit before the local
        correction, slower on large grids)

    Returns
    -------
    SimpleITK image, 3 float64 components per voxel, LPS mm: the displacement
    ``moving point - fixed point`` at each voxel centre, ready for
    ``sitk.DisplacementFieldTransform`` and ``sitk.Resample`` of the moving image
    onto the reference grid.  Its values sample :func:`correspondence_warp`
    (biharmonic spline, Duchon 1977; Carr et al. 2001; Wendland 1995 correction),
    which is exact at the fixed surface's vertices.  Raises SurfaceError when
    the reference is missing or unreadable, or when its grid does not contain
    the fixed surface (the message says by how much).
    """
    sitk = require_simpleitk("a displacement-field image")
    grid = ImageGrid.of(reference)
    corr, source, target, change = surfaces_of(corr, source, target)
    surface = target if _check_fixed(fixed) == "target" else source
    check_contains(grid, surface, "follow-up (target)" if fixed == "target" else "baseline (source)")
    carrier = corr if change is None else _Carrier(corr, (source, target), change)
    warp = correspondence_warp(carrier, source, target, fixed=fixed, centres=centres, seed=seed)
    n = int(np.prod(grid.size))
    values = np.empty((n, 3))
    for start in range(0, n, 262144):  # blocks keep the distance matrices small
        stop = min(n, start + 262144)
        values[start:stop] = warp(grid.points(start, stop))
    values[:, :2] *= -1.0  # RAS -> LPS vectors
    image = sitk.GetImageFromArray(values.reshape(grid.size[::-1] + (3,)), isVector=True)
    origin, spacing, direction = grid.itk_geometry()
    image.SetOrigin(origin)
    image.SetSpacing(spacing)
    image.SetDirection(direction)
    for key, value in registration_provenance(fixed).items():
        image.SetMetaData(f"surfacekit_{key}", value)
    return image


class _Carrier:
    """A Comparison-like view (correspondence, surfaces, change) for the warp."""

    def __init__(self, correspondence, surfaces, change):
        self.correspondence, self.surfaces, self.change = correspondence, surfaces, change


def check_contains(grid: ImageGrid, surface: Surface, what: str) -> None:
    """A one-line SurfaceError when `surface` reaches outside the image extent of `grid`."""
    outside = grid.outside_mm(surface.vertices)
    if outside > 1e-6:
        raise SurfaceError(f"the reference grid ({grid.name}) does not contain the {what} "
                           f"surface: it reaches {outside:.1f} mm outside the image")


def _as_mapping(transform: Any, kind: str):
    """(function of (n, 3) RAS points, grid or None) for any transform surfacekit accepts."""
    if isinstance(transform, Correspondence):
        m = pose_matrix(transform, kind)
        return (lambda p: p @ m[:3, :3].T + m[:3, 3]), None
    if isinstance(transform, Transform):
        return transform.apply, None
    if isinstance(transform, (np.ndarray, list, tuple)):
        m = np.asarray(transform, dtype=np.float64)
        if m.shape != (4, 4) or not np.isfinite(m).all():
            raise SurfaceError(f"a matrix transform must be a finite (4, 4) array, got {m.shape}")
        return (lambda p: p @ m[:3, :3].T + m[:3, 3]), None
    if isinstance(transform, (str, Path)):
        path = Path(transform)
        if suffix_of(path, TRANSFORM_SUFFIXES):
            transform = read_transform(path)
        elif suffix_of(path, VOLUME_SUFFIXES):
            transform = read_field_image(path)
        else:
            raise SurfaceError(f"{path.name} is neither a transform file "
                               f"({', '.join(TRANSFORM_SUFFIXES)}) nor a displacement-field "
                               f"image ({', '.join(VOLUME_SUFFIXES)})")
    if is_sitk_image(transform):
        itk = field_transform(transform)
        return (lambda p: transform_file_points(itk, p)), ImageGrid.of(transform)
    if is_sitk_transform(transform):
        return (lambda p: transform_file_points(transform, p)), None
    raise SurfaceError(f"cannot use a {type(transform).__name__} as a transform (give a "
                       "Correspondence, Transform, (4, 4) matrix, ITK transform or field)")


def transform_points(transform: Any, points, *, kind: str = "rigid") -> np.ndarray:
    """Map (n, 3) RAS points (mm) through a transform; returns (n, 3) mm.

    `transform` is a Correspondence (its `kind` pose, source -> target), a
    surfacekit Transform or a (4, 4) RAS matrix (applied as is), or an
    image-registration result: an ITK transform file (``.tfm .txt .h5 .hdf5
    .mat``), a displacement-field image file or a SimpleITK transform or vector
    image, applied as ITK applies it (fixed -> moving, LPS converted).  Points
    outside a displacement field's grid are a SurfaceError (ITK would leave them
    unmoved).
    """
    p = np.asarray(points, dtype=np.float64)
    if p.ndim != 2 or p.shape[1] != 3 or not np.isfinite(p).all():
        raise SurfaceError(f"points must be a finite (n, 3) array, got shape {p.shape}")
    if kind not in KINDS:
        check_kind(kind)
    mapping, grid = _as_mapping(transform, kind)
    if grid is not None:
        outside = grid.outside_mm(p)
        if outside > 1e-6:
            raise SurfaceError(f"points reach {outside:.1f} mm outside the displacement field's "
                               "grid, where it says nothing")
    return mapping(p)


def apply_transform(surface: Surface, transform_or_field: Any, *, kind: str = "rigid") -> Surface:
    """The surface moved through a transform or displacement field (see :func:`transform_points`).

    Use it to bring an image-registration result onto a surface (a surface in
    the fixed image's space lands in the moving image's space), e.g. to compare
    it with ``sk.match``.  Faces keep their outward orientation (they are
    reversed when the transform mirrors).  ``metadata["transformed_by"]`` names
    the transform and ``metadata["world_frame"]`` the frame.
    """
    if not isinstance(surface, Surface):
        raise SurfaceError(f"expected a Surface, got {type(surface).__name__}")
    moved = transform_points(transform_or_field, surface.vertices, kind=kind)
    faces = surface.faces
    result = Surface(moved, faces)
    if surface.is_closed and np.sign(result.signed_volume) != np.sign(surface.signed_volume):
        faces = faces[:, ::-1].copy()
    name = str(transform_or_field) if isinstance(transform_or_field, (str, Path)) \
        else type(transform_or_field).__name__
    return Surface(moved, faces, metadata={**surface.metadata, "transformed_by": name,
                                           "world_frame": WORLD_FRAME})
