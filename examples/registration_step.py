"""A registration-pipeline step with surfacekit (synthetic data, invented here; not a patient).

Two label volumes of one organ (baseline and follow-up, on different oblique scanner grids)
-> surfaces -> match -> rigid transform file and displacement field -> SimpleITK resamples the
baseline labels onto the follow-up grid -> Dice overlap with the follow-up labels
(Dice, Ecology 1945).  Then the other way in: an image-registration result (here the field
just written) moves the follow-up surface, and is compared with the surface match.

Needs the itk extra: pip install 'surfacekit[itk]'.  Run: python examples/registration_step.py
Writes ./registration-step/.  Conventions: surfacekit's world frame is RAS mm (NIfTI's);
ITK files are LPS mm, converted on the way in and out; transforms and fields map points of the
fixed image (follow-up) to the moving image (baseline), as image resampling expects.
"""
from pathlib import Path

import numpy as np
import SimpleITK as sitk

import surfacekit as sk

out = Path("registration-step")
out.mkdir(exist_ok=True)


def oblique_grid(angle_deg: float, spacing, size, centre_lps):
    """An empty uint8 image whose axes are turned about z and whose y axis is flipped."""
    a = np.radians(angle_deg)
    turn = np.array([[np.cos(a), -np.sin(a), 0], [np.sin(a), np.cos(a), 0], [0, 0, 1]])
    direction = turn @ np.diag([1.0, -1.0, 1.0])
    image = sitk.Image([int(n) for n in size], sitk.sitkUInt8)
    image.SetSpacing([float(s) for s in spacing])
    image.SetDirection(direction.ravel().tolist())
    half = (np.asarray(size) - 1) / 2 * np.asarray(spacing)
    image.SetOrigin((np.asarray(centre_lps) - direction @ half).tolist())
    return image


def paint(image, inside):
    """Label 1 where `inside(points)` holds, points in LPS mm (SimpleITK's frame)."""
    size = image.GetSize()
    k, j, i = np.meshgrid(*[np.arange(n) for n in size[::-1]], indexing="ij")
    index = np.stack([i.ravel(), j.ravel(), k.ravel()], axis=1).astype(float)
    d = np.array(image.GetDirection()).reshape(3, 3)
    points = np.array(image.GetOrigin()) + (index * image.GetSpacing()) @ d.T
    labels = sitk.GetImageFromArray(inside(points).reshape(size[::-1]).astype(np.uint8))
    labels.CopyInformation(image)
    return labels


def organ(p):
    """A bean 64 x 36 x 28 mm, thicker at one pole."""
    taper = 1 + 0.25 * p[:, 0] / 32
    return ((p[:, 0] / 32) ** 2 + ((p[:, 1] - 0.008 * p[:, 0] ** 2) / (18 * taper)) ** 2
            + (p[:, 2] / (14 * taper)) ** 2) <= 1


def grown(p):
    """The follow-up: the organ moved 5 mm and its +x pole grown by up to 10 mm (inverse map)."""
    q = p - [5.0, 0.0, 0.0]
    x = q.copy()
    for _ in range(50):  # invert x -> x + growth(x) by fixed-point iteration
        bump = np.exp(-np.sum((x - [30.0, 0, 0]) ** 2, axis=1) / (2 * 14.0 ** 2))
        x = q - np.outer(bump, [10.0, 0, 0])
    return organ(x)


baseline_img = paint(oblique_grid(20, (1.5, 1.25, 2.0), (60, 56, 40), (0, 0, 0)), organ)
followup_img = paint(oblique_grid(-15, (1.25, 1.5, 2.0), (72, 50, 40), (8, 0, 0)), grown)
sitk.WriteImage(baseline_img, str(out / "baseline.nrrd"))
sitk.WriteImage(followup_img, str(out / "followup.nii.gz"))

# label volumes -> surfaces (both land in RAS mm, whatever the file format)
baseline, _ = sk.prepare(sk.from_segmentation(out / "baseline.nrrd", 1), target_vertices=2500)
followup, _ = sk.prepare(sk.from_segmentation(out / "followup.nii.gz", 1), target_vertices=2500)
corr = sk.match(baseline, followup)

# surfacekit -> image toolkit: a rigid transform file and a displacement field
sk.save_transform(corr, out / "rigid.tfm", kind="rigid")  # follow-up (fixed) -> baseline (moving)
field = sk.displacement_field(corr, out / "followup.nii.gz", baseline, followup)
sitk.WriteImage(field, str(out / "field.nrrd"))


def dice(a, b):
    x, y = sitk.GetArrayViewFromImage(a) > 0, sitk.GetArrayViewFromImage(b) > 0
    return 2 * np.sum(x & y) / (np.sum(x) + np.sum(y))


def resample(transform):
    return sitk.Resample(baseline_img, followup_img, transform, sitk.sitkNearestNeighbor, 0)


rigid = sitk.ReadTransform(str(out / "rigid.tfm"))
warp = sitk.DisplacementFieldTransform(sitk.ReadImage(str(out / "field.nrrd"), sitk.sitkVectorFloat64))
print(f"Dice, no transform:        {dice(resample(sitk.Transform()), followup_img):.3f}")
print(f"Dice, rigid transform:     {dice(resample(rigid), followup_img):.3f}")
print(f"Dice, displacement field:  {dice(resample(warp), followup_img):.3f}")

# image toolkit -> surfacekit: a registration result moves the follow-up surface into the
# baseline's space; how far its points land from the surface match's points:
moved = sk.apply_transform(followup, out / "field.nrrd")
by_match = baseline.vertices[corr.target_to_source]
gap = np.linalg.norm(moved.vertices - by_match, axis=1)
print(f"field vs. vertex map: median {np.median(gap):.2f} mm, 95th percentile "
      f"{np.percentile(gap, 95):.2f} mm (the map moves in whole vertices)")
print(f"written to {out}/")
