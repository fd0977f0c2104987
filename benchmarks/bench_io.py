"""Mesh loading speed and memory: surfacekit's own parsers beside trimesh's, same run.

Run:  python benchmarks/bench_io.py [--subdivisions 6] [--repeats 3]

A unit icosphere (subdivision 6: 40962 vertices, 81920 faces) is written once per
format by surfacekit; each file is then read by ``sk.load`` and by
``trimesh.load_mesh(process=False)`` (the baseline).  Printed per format: best-of-N
seconds for both, the ratio baseline/ours (> 1 means surfacekit is faster), and
surfacekit's tracemalloc peak over the file size.  A final line times refusing a
PLY whose header claims 10^12 vertices.  Timings on a shared machine are inflated
and noisy; compare ratios, not absolute seconds.
"""
from __future__ import annotations

import argparse
import tempfile
import time
import tracemalloc
from pathlib import Path

import surfacekit as sk


def best_of(fn, repeats: int) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--subdivisions", type=int, default=6)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    import trimesh

    s = sk.synthetic.icosphere(args.subdivisions)
    print(f"mesh: {s.n_vertices} vertices, {s.n_faces} faces")
    print(f"{'format':<12}{'MB':>7}{'ours s':>9}{'trimesh s':>11}{'ratio':>8}{'peak/size':>11}")
    with tempfile.TemporaryDirectory() as tmp:
        for ext, binary in [("ply", True), ("ply", False), ("stl", True), ("stl", False),
                            ("obj", False), ("off", False)]:
            path = Path(tmp) / f"sphere.{ext}"
            sk.save(s, path, binary=binary)
            ours = best_of(lambda p=path: sk.load(p), args.repeats)
            theirs = best_of(lambda p=path: trimesh.load_mesh(str(p), process=False), args.repeats)
            tracemalloc.start()
            sk.load(path)
            peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
            size = path.stat().st_size
            label = f"{ext}-{'bin' if binary else 'ascii'}"
            print(f"{label:<12}{size / 1e6:>7.1f}{ours:>9.3f}{theirs:>11.3f}{theirs / ours:>8.2f}"
                  f"{peak / size:>11.1f}")
        bomb = Path(tmp) / "claims.ply"
        bomb.write_bytes(b"ply\nformat binary_little_endian 1.0\nelement vertex 1000000000000\n"
                         b"property float x\nproperty float y\nproperty float z\nelement face 1\n"
                         b"property list uchar int vertex_indices\nend_header\n" + bytes(64))
        t0 = time.perf_counter()
        try:
            sk.load(bomb)
        except sk.SurfaceError as exc:
            print(f"refused 10^12-vertex header in {time.perf_counter() - t0:.4f} s: {exc}")


if __name__ == "__main__":
    main()
