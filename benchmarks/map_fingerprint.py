"""Fingerprints of a fixed set of results, to show that a restructuring changes no numbers.

Runs sk.match on a fixed set of ground-truth pairs (synthetic, invented shapes) and
on the shipped synthetic demo pair, then measure_change and transfer_labels on the
demo pair, and prints a SHA-256 of each result's arrays. Run it before and after a
change and compare the printed lines (``--save FILE`` writes them as JSON,
``--compare FILE`` exits 1 when any differs).

Usage: python benchmarks/map_fingerprint.py [--save FILE | --compare FILE]
"""
from __future__ import annotations

import argparse
import hashlib
import json
import sys
import warnings
from pathlib import Path

import numpy as np

# the ground-truth generator is a module of the test suite; benchmarks are scripts beside it
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from groundtruth import make_pair

import surfacekit as sk

ROOT = Path(__file__).resolve().parents[1]
PAIRS = [("kidney", "growth", 3), ("liver", "anisotropic", 5), ("hippocampus", "bend", 8),
         ("ventricle", "mixed", 11), ("kidney", "noise", 13)]


def digest(*arrays) -> str:
    h = hashlib.sha256()
    for a in arrays:
        a = np.ascontiguousarray(a)
        h.update(str(a.dtype).encode() + str(a.shape).encode())
        h.update(a.tobytes())
    return h.hexdigest()[:16]


def fingerprints() -> dict[str, str]:
    out = {}
    warnings.simplefilter("ignore")
    for kind, deformation, seed in PAIRS:
        pair = make_pair(kind, deformation, n_source=1500, n_target=1800, seed=seed)
        corr = sk.match(pair.source, pair.target, seed=0)
        out[f"match {kind}/{deformation}/{seed}"] = digest(corr.source_to_target,
                                                          corr.target_to_source)
    demo = ROOT / "sample_meshes" / "demo"
    base = sk.load(demo / "kidney_baseline.ply")
    follow = sk.load(demo / "kidney_followup.ply")
    template, template_fields = sk.io.load_with_fields(demo / "kidney_template.ply")
    corr = sk.match(base, follow, seed=0)
    out["match demo"] = digest(corr.source_to_target, corr.target_to_source)
    change = sk.measure_change(base, follow, corr)
    out["change demo"] = digest(*[np.asarray(v) for _, v in sorted(change.fields().items())])
    labels = np.round(template_fields["region"]).astype(np.int64)
    tcorr = sk.match(template, base, seed=0)
    out["match template"] = digest(tcorr.source_to_target, tcorr.target_to_source)
    out["labels demo"] = digest(*sk.transfer_labels(template, labels, base, tcorr))
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--save")
    ap.add_argument("--compare")
    args = ap.parse_args()
    fp = fingerprints()
    for k, v in fp.items():
        print(f"{k:40s} {v}")
    if args.save:
        Path(args.save).write_text(json.dumps(fp, indent=1))
    if args.compare:
        ref = json.loads(Path(args.compare).read_text())
        bad = [k for k in ref if ref[k] != fp.get(k)]
        print("identical" if not bad else f"DIFFERENT: {bad}")
        return 1 if bad else 0
    return 0


if __name__ == "__main__":
    sys.exit(main())
