"""The image-registration outputs of ``surfacekit match``: ``--transform``, ``--field``, ``--reference``.

Everything is checked before the match runs (formats, the SimpleITK extra, the
reference image, whether its grid contains the follow-up surface), so bad input
costs no matching time; the files are staged with the command's other outputs and
appear only when the whole command succeeded.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from .context import Context, InputError


def add_registration_options(p) -> None:
    """The image-registration options of ``match``."""
    g = p.add_argument_group("image registration (needs pip install 'surfacekit[itk]')")
    g.add_argument("--transform", metavar="FILE",
                   help="also write the pose as an ITK transform file (.tfm .txt .h5 .hdf5 "
                        ".mat) mapping target (follow-up, fixed) points to source (baseline, "
                        "moving) points, world frame converted from RAS to LPS")
    g.add_argument("--transform-kind", choices=("rigid", "similarity", "affine"),
                   default="rigid", help="which pose --transform writes (default rigid)")
    g.add_argument("--field", metavar="FILE",
                   help="also write the map as a displacement-field image (.nii .nii.gz .nrrd "
                        ".mha; LPS mm, fixed = target) on the grid of --reference")
    g.add_argument("--reference", metavar="IMAGE",
                   help="the follow-up (target) image whose grid the field samples (.nii "
                        ".nii.gz .nrrd .nhdr .mha .mhd; only its header is read)")


@dataclass
class RegistrationPlan:
    """Staged output paths and the reference grid, checked before matching."""

    transform: Path | None = None
    kind: str = "rigid"
    field: Path | None = None
    grid: object = None

    @property
    def wanted(self) -> bool:
        return self.transform is not None or self.field is not None


def plan_registration(ctx: Context, target) -> RegistrationPlan:
    """Check the image-registration options against the loaded target surface; claim outputs."""
    from ..analysis.registration import check_contains
    from ..io.images import ImageGrid, require_simpleitk
    from ..io.transforms import FIELD_SUFFIXES, TRANSFORM_SUFFIXES

    a = ctx.args
    if a.field and not a.reference:
        raise InputError("--field needs --reference IMAGE, the follow-up image whose grid it samples")
    if a.reference and not a.field:
        raise InputError("--reference gives the grid of --field; give --field FILE too")
    plan = RegistrationPlan(kind=a.transform_kind)
    if not (a.transform or a.field):
        return plan
    require_simpleitk("--transform and --field")
    if a.field:
        plan.grid = ImageGrid.of(a.reference)
        check_contains(plan.grid, target, "follow-up (target)")
        plan.field = ctx.outputs.claim(a.field, suffixes=FIELD_SUFFIXES)
    if a.transform:
        plan.transform = ctx.outputs.claim(a.transform, suffixes=TRANSFORM_SUFFIXES)
    return plan


def write_registration(plan: RegistrationPlan, corr, source, target, seed: int) -> dict:
    """Write the planned files; the summary's ``registration`` record (with its conventions)."""
    if not plan.wanted:
        return {}
    from ..analysis.registration import (
        displacement_field,
        registration_provenance,
        save_transform,
    )
    from ..io.transforms import write_image

    record = registration_provenance("target")
    if plan.transform is not None:
        save_transform(corr, plan.transform, plan.kind)
        record.update(transform=plan.transform.name, kind=plan.kind)
    if plan.field is not None:
        image = displacement_field(corr, plan.grid, source, target, seed=seed)
        write_image(plan.field, image)
        record.update(field=plan.field.name, reference=plan.grid.name,
                      field_method="biharmonic spline (Duchon 1977) + Wendland correction, "
                                   "exact at the follow-up vertices")
    return {"registration": record}
