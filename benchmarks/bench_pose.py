"""The rigid pose of a map (`Correspondence.rigid`): accuracy and cost, old and new fit.

`sk.match` ends by fitting the rigid pose that change analysis uses to bring the
follow-up into the baseline frame (surfacekit.correspondence.pose.rigid_pose).
This script compares, on the same maps and in the same run:

  * old - the earlier refinement, kept here as a private copy: a robust Kabsch fit
          of the matched vertices, then 10 rounds that move each source vertex
          along its normal to the closest point on the target faces within 2 rings
          of its matched vertex and refit Kabsch (it creeps, it does not converge)
  * new - the package's robust point-to-plane ICP (Chen & Medioni 1992, linearised
          as Low 2004, Tukey weights x map confidence)

on synthetic ground-truth pairs (invented organ-like shapes, tests/groundtruth.py)
whose target is the source shape with local growth, turned and shifted by a known
motion (R, shift).  Pose error: RMS over source vertices of |est(x) - (R x + shift)|
(mm) and the angle of est.R R^T (degrees); the growth leaves the rest of the organ in
place, so (R, shift) is the true pose.  "mixed" (bending, growth, anisotropic growth,
noise) and "anisotropic" pairs have no unique true rigid pose (a stretched shape fits
many poses about equally); their distance to the applied motion is printed separately,
for information only.  Last, the whole `sk.match` on the demo pair
(sample_meshes/demo) with the old and the new pose fit.  Timings are wall clock and
grow when other processes share the machine.

Usage: python benchmarks/bench_pose.py [--quick] [--repeats 3]
"""
from __future__ import annotations

import argparse
import sys
import time
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
# the ground-truth generator is a module of the test suite; benchmarks are scripts beside it
sys.path.insert(0, str(ROOT / "tests"))

from groundtruth import KINDS, make_pair

import surfacekit as sk
from surfacekit.app.demo_data import FOLLOWUP_ROTATION, FOLLOWUP_SHIFT
from surfacekit.correspondence import solver
from surfacekit.correspondence.alignment import rigid_transform
from surfacekit.correspondence.pose import rigid_pose
from surfacekit.mesh.proximity import near_faces, outward_vertex_normals, project_pairs


def old_rigid_pose(source, target, source_to_target, weights, rounds=10, tol_mm=1e-3, rings=2):
    """The earlier refinement (private copy): Kabsch on normal offsets to 2-ring closest points."""
    to_source = rigid_transform(target.vertices[source_to_target], source.vertices, weights=weights)
    pairs = near_faces(target, source_to_target, rings)
    normals = outward_vertex_normals(source)
    moved = to_source.apply(target.vertices)
    used = 0
    for used in range(1, rounds + 1):
        foot = project_pairs(source.vertices, moved, target.faces, pairs)
        h = np.einsum("ij,ij->i", foot - source.vertices, normals)
        goal = source.vertices + h[:, None] * normals
        step = rigid_transform(goal, source.vertices, weights=weights)
        to_source = to_source.then(step)
        moved = to_source.apply(target.vertices)
        if np.abs(step.apply(source.vertices) - source.vertices).max() < tol_mm:
            break
    return to_source.inverse(), used


def pose_error(pose, source, seed) -> tuple[float, float]:
    """RMS vertex error (mm) and rotation error (degrees) against the applied motion of `seed`."""
    R = sk.synthetic.random_rotation(seed)
    shift = np.random.default_rng(seed).normal(0, 50.0, 3)
    true = source.vertices @ R.T + shift
    rms = float(np.sqrt(np.mean(np.sum((pose.apply(source.vertices) - true) ** 2, axis=1))))
    angle = float(np.degrees(np.arccos(np.clip((np.trace(pose.rotation @ R.T) - 1) / 2, -1, 1))))
    return rms, angle


def compare_pair(kind, deformation, seed):
    pair = make_pair(kind, deformation, n_source=2000, n_target=2400, seed=seed)
    corr = sk.match(pair.source, pair.target, seed=0)
    out = {}
    for name, fit in (("old", old_rigid_pose), ("new", rigid_pose)):
        t0 = time.perf_counter()
        pose, rounds = fit(pair.source, pair.target, corr.source_to_target, corr.source_confidence)
        out[name] = (*pose_error(pose, pair.source, seed), rounds, time.perf_counter() - t0)
    print(f"{kind:12s} {deformation:12s} {seed:4d}  " + "   ".join(
        f"{k}: {e:6.3f} mm {a:5.2f} deg {n:2d} rounds {t:5.2f} s" for k, (e, a, n, t) in out.items()),
        flush=True)
    return out


def summary(label, rows):
    if not rows:
        return
    for name in ("old", "new"):
        e, a, n, t = (np.array([r[name][i] for r in rows]) for i in range(4))
        print(f"  {label:12s} {name}: error mean {e.mean():.3f} mm (max {e.max():.3f}), rotation mean "
              f"{a.mean():.2f} deg (max {a.max():.2f}), rounds {n.mean():.1f}, time mean {t.mean():.2f} s")


def demo_match_times(repeats):
    """Best-of-`repeats` wall time of sk.match on the demo pair, with the old and the new pose
    fit; the pose error against the scenario's motion and the largest normal displacement
    (true peak growth 4.5 mm, sample_meshes/demo/SCENARIO.txt)."""
    demo = ROOT / "sample_meshes" / "demo"
    base, follow = sk.load(demo / "kidney_baseline.ply"), sk.load(demo / "kidney_followup.ply")
    print(f"\ndemo pair: {base.n_vertices} -> {follow.n_vertices} vertices, best of {repeats}")
    x = base.vertices
    for name, fit in (("old", old_rigid_pose), ("new", rigid_pose)):
        solver.rigid_pose = fit
        best, lap = np.inf, np.inf
        for _ in range(repeats):
            t0 = time.perf_counter()
            corr = sk.match(base, follow, seed=0)
            best = min(best, time.perf_counter() - t0)
            lap = min(lap, corr.info["timings_s"]["rigid_pose"])
        # the growth moves only the upper pole: the scenario's motion is the true pose there
        true = x @ FOLLOWUP_ROTATION.T + np.asarray(FOLLOWUP_SHIFT)
        error = np.sqrt(np.mean(np.sum((corr.rigid.apply(x) - true) ** 2, axis=1)))
        angle = np.degrees(np.arccos(np.clip((np.trace(corr.rigid.rotation @ FOLLOWUP_ROTATION.T) - 1) / 2,
                                             -1, 1)))
        peak = sk.measure_change(base, follow, corr).normal_displacement.max()
        print(f"  {name}: sk.match {best:.2f} s, of which the rigid pose {lap:.2f} s "
              f"({corr.info['rigid_pose_rounds']} rounds, rms {corr.rigid.rms:.4f} mm); pose error "
              f"{error:.3f} mm {angle:.2f} deg; max normal displacement {peak:.3f} mm (true 4.5)")
    solver.rigid_pose = rigid_pose


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="growth pairs of seed 201 only, no extra pairs")
    ap.add_argument("--repeats", type=int, default=3, help="sk.match runs on the demo pair (best is kept)")
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore", sk.AmbiguousMatchWarning)
    growth_seeds = (201,) if args.quick else (201, 202, 203)
    print("pose error against the applied motion; old and new fits of the same map")
    growth = [compare_pair(k, "growth", s) for s in growth_seeds for k in KINDS]
    others = {} if args.quick else {d: [compare_pair(k, d, 200) for k in KINDS]
                                     for d in ("mixed", "anisotropic")}
    print("\nsummary (growth: the applied motion is the true pose)")
    summary("growth", growth)
    if others:
        print("no unique true pose (distance to the applied motion, for information):")
        for d, rows in others.items():
            summary(d, rows)
    demo_match_times(args.repeats)


if __name__ == "__main__":
    main()
