"""A synthetic follow-up study as label volumes on oblique, flipped grids (test helper).

The baseline organ is a bent ellipsoid (a kidney-like bean, 64 x 36 x 28 mm); the
follow-up is the same organ deformed by a known smooth map (its upper pole grows
outward by up to 7 mm and the organ bends) and then moved rigidly.  Each volume
lies on its own grid whose axes are oblique (rotated about all three axes) and
flipped (a negative determinant), with anisotropic voxels, so every part of an
image geometry (origin, spacing, direction) is exercised.  Geometry is given in
LPS, as SimpleITK stores it; the organ is defined in RAS, surfacekit's frame.
"""
from __future__ import annotations

import numpy as np

LPS_TO_RAS = np.diag([-1.0, -1.0, 1.0])
#: an oblique rotation with entries k/25 (exact in binary with spacings that are multiples of 25/16)
OBLIQUE = np.array([[0.64, -0.6, 0.48], [0.48, 0.8, 0.36], [-0.6, 0.0, 0.8]])
POLE = np.array([30.0, 0.0, 0.0])
GROWTH_MM = 12.0
TURN_DEG = 12.0
SHIFT_MM = np.array([6.0, -4.0, 3.0])


def inside_baseline(x: np.ndarray) -> np.ndarray:
    """Label 1 inside the baseline organ, for (n, 3) RAS points (mm)."""
    bent = x[:, 1] - 0.008 * x[:, 0] ** 2
    taper = 1.0 + 0.25 * x[:, 0] / 32.0  # one pole thicker: no mirror symmetry
    return ((x[:, 0] / 32.0) ** 2 + (bent / (18.0 * taper)) ** 2
            + ((x[:, 2] - 0.1 * x[:, 1]) / (14.0 * taper)) ** 2 <= 1.0)


def growth(x: np.ndarray) -> np.ndarray:
    """Smooth non-rigid displacement (mm) of baseline points: the upper pole grows outward."""
    bump = np.exp(-np.sum((x - POLE) ** 2, axis=1) / (2 * 14.0 ** 2))
    out = np.zeros_like(x)
    out[:, 0] = GROWTH_MM * bump
    out[:, 1] = 0.006 * x[:, 0] ** 2 - 4.0 * bump
    return out


def rotation() -> np.ndarray:
    t = np.radians(TURN_DEG)
    return np.array([[np.cos(t), -np.sin(t), 0.0], [np.sin(t), np.cos(t), 0.0], [0.0, 0.0, 1.0]])


def followup_to_baseline(y: np.ndarray) -> np.ndarray:
    """The true map from follow-up points to baseline points (inverse of growth then motion)."""
    z = (y - SHIFT_MM) @ rotation()  # undo the rigid motion
    x = z.copy()
    for _ in range(60):  # fixed point of x = z - growth(x): growth is a contraction here
        x = z - growth(x)
    return x


def grid(direction: np.ndarray, spacing, size, centre_ras) -> dict:
    """LPS geometry of a grid whose centre voxel lies at `centre_ras`."""
    d = np.asarray(direction, float)
    sp = np.asarray(spacing, float)
    half = (np.asarray(size) - 1) / 2.0
    centre_lps = LPS_TO_RAS @ np.asarray(centre_ras, float)
    origin = centre_lps - d @ (sp * half)
    return {"direction": d, "spacing": sp, "size": tuple(int(n) for n in size), "origin": origin}


def grid_points_ras(g: dict) -> np.ndarray:
    """RAS points of every voxel, in SimpleITK array order [k, j, i] flattened."""
    k, j, i = np.meshgrid(*[np.arange(n) for n in g["size"][::-1]], indexing="ij")
    idx = np.stack([i.ravel(), j.ravel(), k.ravel()], axis=1).astype(float)
    lps = g["origin"] + (idx * g["spacing"]) @ g["direction"].T
    return lps @ LPS_TO_RAS


def sitk_labels(g: dict, labels: np.ndarray):
    import SimpleITK as sitk

    image = sitk.GetImageFromArray(labels.reshape(g["size"][::-1]).astype(np.uint8))
    image.SetOrigin(tuple(g["origin"]))
    image.SetSpacing(tuple(g["spacing"]))
    image.SetDirection(tuple(g["direction"].ravel()))
    return image


def baseline_grid() -> dict:
    flip = np.diag([1.0, -1.0, 1.0])  # a flipped axis: determinant -1
    return grid(OBLIQUE @ flip, (1.5625, 1.25, 1.875), (60, 56, 52), (0.0, 3.0, 0.0))


def followup_grid() -> dict:
    turn = np.array([[0.8, 0.0, -0.6], [0.0, -1.0, 0.0], [-0.6, 0.0, -0.8]])  # det -1
    return grid(turn, (1.25, 1.5625, 1.875), (64, 56, 48), SHIFT_MM + np.array([6.0, 8.0, 0.0]))


def scene():
    """(baseline image, follow-up image) as SimpleITK uint8 label images (label 1)."""
    gb, gf = baseline_grid(), followup_grid()
    base = sitk_labels(gb, inside_baseline(grid_points_ras(gb)))
    follow = sitk_labels(gf, inside_baseline(followup_to_baseline(grid_points_ras(gf))))
    return base, follow


def dice(a, b) -> float:
    """Dice overlap 2|A∩B| / (|A| + |B|) of two label images (Dice, Ecology 1945)."""
    import SimpleITK as sitk

    x = sitk.GetArrayViewFromImage(a) > 0
    y = sitk.GetArrayViewFromImage(b) > 0
    return float(2.0 * np.sum(x & y) / (np.sum(x) + np.sum(y)))
