"""Partial-to-whole correspondence benchmark: cropped follow-ups (synthetic, invented shapes).

Run through ``python benchmarks/bench_match.py --partial`` (or this file directly).  Each
organ kind of the ground-truth generator is paired with a follow-up that is deformed (none,
local growth, anisotropic growth, scanner noise, all mixed), moved to a random pose, and
cropped: 10-50% of its area is cut away by a plane at a random position and angle
(``tests/partialtruth.py``).  ``sk.match(baseline, cropped follow-up)`` is scored on

* the mean normalised geodesic error of the cropped surface's vertices (each partner on the
  whole baseline against the true point, divided by sqrt(baseline area)),
* the intersection over union of ``source_overlap`` with the truly covered baseline vertices,
* for pairs without deformation beyond the crop, the area share of the covered baseline
  region whose |normal displacement| (``sk.measure_change``) is below 0.5 mm (no false change),
* the volume of ``sk.complete`` against the uncropped follow-up, for crops up to 30%.

Pairs whose placement is flagged ambiguous (a turned placement fits almost as well, as on the
near-round ventricle) are matched again with 3 true landmark pairs, as a user would after the
warning; both errors are printed, the main table keeps the landmark-free result.
Pairs flagged low-confidence (``sk.NoMatchWarning``: the part looks like no part of the whole)
are counted; a last section maps a crop of each organ kind into a whole of each other kind,
where every map should be flagged.
Timings are inflated when other processes share the machine.
"""
from __future__ import annotations

import sys
import time
import warnings
from pathlib import Path

import numpy as np
from scipy.spatial import cKDTree

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from groundtruth import KINDS, make_pair
from partialtruth import crop_pair, iou, partial_error

import surfacekit as sk
from surfacekit.mesh.sampling import farthest_points

DEFORMATIONS = ("none", "none", "growth", "anisotropic", "noise", "mixed")


def pairs(n: int, seeds: int):
    """The cropped benchmark pairs: every kind x deformation, `seeds` rounds (held-out seeds)."""
    out = []
    for s in range(seeds):
        for i, kind in enumerate(KINDS):
            for j, d in enumerate(DEFORMATIONS):
                seed = 300 + 100 * s + 10 * i + j
                share = float(np.random.default_rng(seed).uniform(0.1, 0.5))
                out.append(crop_pair(make_pair(kind, d, n_source=n, n_target=int(1.2 * n), seed=seed),
                                     share, seed))
    return out


def landmarks(p, n: int = 3) -> tuple:
    """`n` well-spread covered baseline vertices and the cropped follow-up vertices nearest their
    true images (what an expert would place)."""
    covered = np.flatnonzero(p.covered)
    ids = covered[farthest_points(p.source.vertices[covered], n, seed=5)]
    face, bary = p.source_truth
    whole = p.whole_target
    pts = np.einsum("nk,nkd->nd", bary[ids], whole.vertices[whole.faces[face[ids]]])
    return tuple(zip(ids.tolist(), cKDTree(p.target.vertices).query(pts)[1].tolist()))


def run(n: int = 3000, seeds: int = 1) -> None:
    rows, flagged = [], []
    for p in pairs(n, seeds):
        t0 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            corr = sk.match(p.source, p.target)
        seconds = time.perf_counter() - t0
        err = partial_error(p, corr.target_to_source, p.source).mean()
        overlap = iou(corr.source_overlap, p.covered)
        line = f"  {p.name:44s} error {err:.4f}  IoU {overlap:.3f}  ({seconds:.1f}s)"
        still = np.nan
        if p.name.split("/")[1] == "none":
            change = sk.measure_change(p.source, p.target, corr)
            nd, w = change.normal_displacement, p.source.vertex_areas
            ok = corr.source_overlap & np.isfinite(nd)
            still = float(w[ok & (np.abs(np.nan_to_num(nd)) < 0.5)].sum() / w[ok].sum())
            line += f"  |normal displacement| < 0.5 mm over {still:.1%} of the covered region"
        volume = np.nan
        if p.cut_share <= 0.30:
            done = sk.complete(p.target, p.source, corr)
            volume = done.volume_mm3 / p.whole_target.volume - 1.0
            line += f"  completed volume {volume:+.1%}"
        amb = corr.info.get("rotation_ambiguity") or {}
        if amb.get("ambiguous"):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                fixed = sk.match(p.source, p.target, sk.MatchOptions(landmarks=landmarks(p)))
            e_lm = partial_error(p, fixed.target_to_source, p.source).mean()
            flagged.append((p.name, err, e_lm))
            line += f"  [ambiguous; 3 landmarks: {e_lm:.4f}]"
        if corr.low_confidence:
            line += "  [low confidence]"
        rows.append((p.name, err, overlap, still, volume, seconds, bool(amb.get("ambiguous")),
                     corr.low_confidence, corr.info["match_check"]["score"]))
        print(line, flush=True)
    summarise(rows, flagged, n)
    other_organs(n)


def other_organs(n: int) -> None:
    """A crop of each organ kind mapped into a whole of each other kind: should be flagged."""
    crops = {kind: crop_pair(make_pair(kind, "none", n_source=n, n_target=int(1.2 * n), seed=300 + 10 * i),
                             0.3, 300 + 10 * i) for i, kind in enumerate(KINDS)}
    print("\ncrop of one organ kind mapped into a whole of another (sk.NoMatchWarning expected):")
    hits, total = 0, 0
    for part_kind, p in crops.items():
        for whole_kind, w in crops.items():
            if part_kind == whole_kind:
                continue
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                corr = sk.match(w.source, p.target)
            check = corr.info["match_check"]
            hits, total = hits + corr.low_confidence, total + 1
            print(f"  {part_kind:12s} crop into {whole_kind:12s} score {check['score']:.2f}  "
                  f"{'flagged' if corr.low_confidence else 'NOT flagged'}", flush=True)
    print(f"flagged {hits} of {total}")


def summarise(rows, flagged, n: int) -> None:
    err = np.array([r[1] for r in rows])
    ious = np.array([r[2] for r in rows])
    still = np.array([r[3] for r in rows if np.isfinite(r[3])])
    vol = np.array([r[4] for r in rows if np.isfinite(r[4])])
    clear = np.array([r[1] for r in rows if not r[6]])
    low = [r[0] for r in rows if r[7]]
    print(f"\n{len(rows)} cropped pairs (10-50% of the follow-up's area cut away), ~{n} / {int(1.2 * n)} "
          "vertices before the crop, random poses")
    print(f"mean normalised geodesic error over the cropped surface's vertices: {err.mean():.4f} "
          f"(median {np.median(err):.4f}, worst {err.max():.4f}; goal <= 0.03, aim 0.02)")
    print(f"  pairs not flagged ambiguous: {len(clear)}, mean {clear.mean():.4f}, worst "
          f"{clear.max() if len(clear) else float('nan'):.4f}")
    for name, e0, e1 in flagged:
        print(f"  flagged {name:40s} without landmarks {e0:.4f}   with 3 landmark pairs {e1:.4f}")
    print(f"pairs flagged low-confidence (sk.NoMatchWarning): {len(low)} {low or ''}(no-match score "
          f"{min(r[8] for r in rows):.2f}-{max(r[8] for r in rows):.2f}, flagged from 1)")
    print(f"IoU of source_overlap with the true covered region: mean {ious.mean():.3f}, worst "
          f"{ious.min():.3f} (goal >= 0.90, aim 0.95)")
    if len(still):
        print(f"pairs without deformation beyond the crop: |normal displacement| < 0.5 mm over "
              f"{still.min():.1%} (worst pair) to {still.max():.1%} of the covered region (goal >= 95%)")
    if len(vol):
        print(f"sk.complete, crops up to 30%: volume error against the uncropped follow-up "
              f"{np.abs(vol).mean():.1%} mean, {np.abs(vol).max():.1%} worst (goal <= 5%)")
    print(f"median time per match {np.median([r[5] for r in rows]):.1f}s (machine shared)")


if __name__ == "__main__":
    run()
