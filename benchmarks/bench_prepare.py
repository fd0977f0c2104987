"""Benchmark: a CT-sized label volume to a prepared 20k-vertex organ surface.

A synthetic (invented) 512 x 512 x 300 label volume, 0.75 x 0.75 x 1.5 mm voxels,
holds a liver-sized label (about 1.5 litres, a typical adult liver volume, from
memory) and two smaller organs.  Printed side by side, measured in the same run:

* baseline: plain scikit-image marching cubes of ``volume == label`` on the whole
  volume (no cropping, no repair, no smoothing);
* ``sk.from_segmentation`` alone (slab scan, crop, marching cubes, affine);
* ``sk.from_segmentation`` + ``sk.prepare(target_vertices=20000)``;
* the same from a ``.nii.gz`` file (``--nifti``).

Peak memory is the peak of Python/NumPy allocations during each step
(``tracemalloc``, in a second, untimed run; the input volume, allocated before,
is not counted; memory allocated inside compiled decimation code is not traced).  Timings on a shared
machine are inflated by other jobs; the ratios are the point.

Run:  python benchmarks/bench_prepare.py [--nifti] [--target 20000]
"""
from __future__ import annotations

import argparse
import tempfile
import time
import tracemalloc
from pathlib import Path

import numpy as np

import surfacekit as sk

SHAPE = (512, 512, 300)
SPACING = np.array([0.75, 0.75, 1.5])  # mm
LIVER = 1


def _organ_mask(centre, axes, bumps: float, seed: int):
    """Inside test of a lumpy ellipsoid (world mm) inside its own voxel box, with smooth
    radial bumps; returns the box's lower corner and the boolean mask."""
    rng = np.random.default_rng(seed)
    coeffs = rng.normal(size=(3, 3)) * bumps
    centre, axes = np.asarray(centre), np.asarray(axes)
    reach = axes * (1 + 9 * bumps)
    lo = np.maximum(np.floor((centre - reach) / SPACING).astype(int), 0)
    hi = np.minimum(np.ceil((centre + reach) / SPACING).astype(int) + 1, SHAPE)
    grids = np.meshgrid(*[np.arange(a, b) * s for a, b, s in zip(lo, hi, SPACING)],
                        indexing="ij", sparse=True)
    p = [(g - c) / a for g, c, a in zip(grids, centre, axes)]
    rho = np.sqrt(p[0] ** 2 + p[1] ** 2 + p[2] ** 2)
    safe = np.maximum(rho, 1e-9)
    radius = 1.0
    for i in range(3):
        for j in range(3):
            radius = radius + coeffs[i, j] * np.sin((i + 1) * np.pi * p[j] / safe)
    return lo, rho <= radius


def make_volume() -> np.ndarray:
    """uint8 labels: 1 liver (~1.5 l), 2 and 3 kidney-sized blobs."""
    vol = np.zeros(SHAPE, np.uint8)
    organs = [  # label, centre mm, semi-axes mm, bump amplitude, seed
        (LIVER, (180.0, 190.0, 230.0), (102.5, 78.0, 44.0), 0.05, 1),
        (2, (120.0, 270.0, 160.0), (30.0, 25.0, 55.0), 0.04, 2),
        (3, (270.0, 275.0, 165.0), (30.0, 25.0, 55.0), 0.04, 3),
    ]
    for label, centre, axes, bumps, seed in organs:
        lo, inside = _organ_mask(centre, axes, bumps, seed)
        box = vol[lo[0]:lo[0] + inside.shape[0], lo[1]:lo[1] + inside.shape[1],
                  lo[2]:lo[2] + inside.shape[2]]
        box[inside] = label
    return vol


def measure(fn):
    """(result, seconds, peak MiB): timed untraced, then run again under tracemalloc
    (tracing slows allocation-heavy code, so it must not be in the timing)."""
    t = time.perf_counter()
    out = fn()
    seconds = time.perf_counter() - t
    tracemalloc.start()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return out, seconds, peak / 2**20


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--target", type=int, default=20000)
    parser.add_argument("--nifti", action="store_true", help="also run from a .nii.gz file")
    args = parser.parse_args()

    t = time.perf_counter()
    vol = make_volume()
    count = int((vol == LIVER).sum())
    voxel = float(np.prod(SPACING))
    print(f"volume {SHAPE} uint8 ({vol.nbytes / 2**20:.0f} MiB), voxels {SPACING.tolist()} mm, "
          f"liver label {count} voxels = {count * voxel / 1e6:.3f} l "
          f"(built in {time.perf_counter() - t:.1f} s)")
    affine = np.diag([*SPACING, 1.0])

    def baseline():
        from skimage.measure import marching_cubes

        v, _, _, _ = marching_cubes(vol == LIVER, level=0.5, spacing=tuple(SPACING))
        return len(v)

    rows = []
    n, sec, peak = measure(baseline)
    rows.append(("plain marching cubes (whole volume)", sec, peak, n, None))
    base_sec, base_peak = sec, peak

    s, sec, peak = measure(lambda: sk.from_segmentation(vol, LIVER, affine=affine))
    rows.append(("sk.from_segmentation", sec, peak, s.n_vertices, s.volume / (count * voxel) - 1))

    def full():
        surface = sk.from_segmentation(vol, LIVER, affine=affine)
        return sk.prepare(surface, target_vertices=args.target)

    (prepared, report), sec, peak = measure(full)
    rows.append((f"from_segmentation + prepare({args.target})", sec, peak, prepared.n_vertices,
                 prepared.volume / (count * voxel) - 1))

    if args.nifti:
        import nibabel as nib

        with tempfile.TemporaryDirectory() as tmp:
            path = Path(tmp) / "labels.nii.gz"
            nib.save(nib.Nifti1Image(vol, affine), str(path))

            def from_file():
                return sk.prepare(sk.from_segmentation(path, LIVER), target_vertices=args.target)

            (p2, _), sec, peak = measure(from_file)
            rows.append((f"same from .nii.gz ({path.stat().st_size / 2**20:.1f} MiB)", sec, peak,
                         p2.n_vertices, p2.volume / (count * voxel) - 1))

    print(f"\n{'step':<42} {'time s':>8} {'x base':>7} {'peak MiB':>9} {'x base':>7} "
          f"{'vertices':>9} {'vol vs mask':>11}")
    for name, sec, peak, n, dv in rows:
        dvs = "" if dv is None else f"{dv:+.2%}"
        print(f"{name:<42} {sec:8.2f} {sec / base_sec:7.2f} {peak:9.0f} {peak / base_peak:7.2f} "
              f"{n:9d} {dvs:>11}")
    q = report.after
    print(f"\nprepared surface: watertight={q.is_watertight} outward={q.is_outward} genus={q.genus} "
          f"components={q.n_components} min angle {q.min_angle_deg:.1f} deg, mean min angle "
          f"{q.mean_min_angle_deg:.1f} deg, warnings={q.warnings or 'none'}")
    print("actions:", *report.actions, sep="\n  ")


if __name__ == "__main__":
    main()
