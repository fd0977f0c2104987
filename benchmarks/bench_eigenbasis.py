"""Eigenbasis speed: surfacekit's solver beside scipy's shift-invert eigsh, same run, same threads.

Run:  python benchmarks/bench_eigenbasis.py [--quick] [--k 100] [--sizes 10000 40000 160000]
      [--needle 5] [--no-real] [--repeats 1]

Meshes: smooth ellipsoids (Fibonacci triangulation, --sizes; --quick drops 160k); a
sphere with needle triangles and vertices of near-zero mass (tests/needle_mesh.py,
icosphere level --needle, 0 to skip); the two whole large-intestine surfaces of
tests/data/real (about 10k and 15k vertices, with boundary loops and, for the male
model, 18 pieces) and the female one split once at its edge midpoints (about 40k).

Both solvers get the same (L, M) and the same shift σ.  The baseline is
``scipy.sparse.linalg.eigsh(L, k, M, sigma=σ)`` (ARPACK, factorising ``L − σM`` with
SuperLU).  Each is timed twice: with BLAS pinned to one thread, and with the
environment's default threads (what a user gets).  surfacekit's ARPACK and block
paths pin BLAS to one thread internally, so its two timings differ only by noise.

Printed per mesh and thread setting: seconds for each, the speed ratio, the largest
relative eigenvalue difference to eigsh (over the eigenvalues that are not zero: a
surface of c parts has c zero eigenvalues), and the largest residual
``‖Lφ − λMφ‖ / (1e-6 · λ_max · ‖Mφ‖)`` of surfacekit's pairs (<= 1 meets the bound).
Then, for each mesh solved by the block path, where its time went.
Targets: ratio >= 2 at 40k, >= 3 at 160k, >= 1 everywhere; difference <= 1e-6.

Timings on a shared machine are inflated by its other work: compare the ratios of
one run, and note the load average (printed at the start and the end).
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from cholespy import CholeskySolverD, MatrixType
from threadpoolctl import threadpool_limits

import surfacekit as sk
from surfacekit.mesh.eigen import eigen_shift
from surfacekit.mesh.eigen_block import PARTS, BlockProfile, block_eigensolve

ROOT = Path(__file__).resolve().parents[1]
# the needle mesh is built by a helper of the test suite; benchmarks are scripts beside it
sys.path.insert(0, str(ROOT / "tests"))
from needle_mesh import needle_sphere

REAL = ROOT / "tests" / "data" / "real"


def split_at_midpoints(s: sk.Surface) -> sk.Surface:
    """Each triangle split into four at its edge midpoints (same shape, about 4x vertices)."""
    f = s.faces
    half = np.sort(np.stack([f, np.roll(f, -1, axis=1)], axis=2).reshape(-1, 2), axis=1)
    edges, inverse = np.unique(half, axis=0, return_inverse=True)
    mid = len(s.vertices) + inverse.reshape(-1, 3)  # midpoints of edges 01, 12, 20
    v = np.vstack([s.vertices, 0.5 * (s.vertices[edges[:, 0]] + s.vertices[edges[:, 1]])])
    a, b, c = f.T
    ab, bc, ca = mid.T
    quads = [(a, ab, ca), (ab, b, bc), (ca, bc, c), (ab, bc, ca)]
    return sk.Surface(v, np.concatenate([np.stack(t, axis=1) for t in quads]))


def cases(args):
    sizes = [n for n in args.sizes if not (args.quick and n > 100_000)]
    for n in sizes:
        yield f"ellipsoid {n // 1000}k", sk.synthetic.ellipsoid((30.0, 20.0, 15.0), n=n, seed=1,
                                                                jitter=0.2)
    if args.needle:
        yield "needles", needle_sphere(args.needle)
    if not args.no_real:
        female = sk.load(REAL / "VHF_large-intestine.vtk")
        yield "VHF colon", female
        yield "VHM colon", sk.load(REAL / "VHM_large-intestine.vtk")
        yield "VHF colon x4", split_at_midpoints(female)


def residual_ratio(L, M, w, V) -> float:
    """Largest ``‖Lφ − λMφ‖ / (1e-6 · λ_max · ‖Mφ‖)``."""
    MV = M @ V
    R = L @ V - MV * w[None, :]
    return float(np.max(np.linalg.norm(R, axis=0) / (1e-6 * w.max() * np.linalg.norm(MV, axis=0))))


def timed(fn, repeats: int):
    best, out = np.inf, None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def compare(s: sk.Surface, L, M, k: int, threads, repeats: int) -> dict:
    sigma = eigen_shift(L, M)
    v0 = np.random.default_rng(0).standard_normal(s.n_vertices)

    def ours():
        s.cache = {key: val for key, val in s.cache.items() if key[0] != "eigenbasis"}
        return sk.eigenbasis(s, k)

    with threadpool_limits(threads):
        t_ref, (w_ref, _) = timed(lambda: spla.eigsh(L, k=k, M=M, sigma=sigma, v0=v0, which="LM"),
                                  repeats)
        t_ours, basis = timed(ours, repeats)
    w_ref = np.sort(w_ref)
    nonzero = w_ref > 1e-9 * w_ref[-1]
    diff = np.abs(basis.values - w_ref)[nonzero] / w_ref[nonzero]
    return {"ref": t_ref, "ours": t_ours, "ratio": t_ref / t_ours, "diff": float(diff.max()),
            "zeros": int((~nonzero).sum()), "res": residual_ratio(L, M, basis.values, basis.vectors),
            "solver": basis.solver}


def profile(L, M, k: int) -> str:
    """Where the block solver's time goes, one BLAS thread."""
    with threadpool_limits(1):
        t0 = time.perf_counter()
        sigma = eigen_shift(L, M)
        A = sp.coo_matrix((L - sigma * M).tocsc())
        chol = CholeskySolverD(A.shape[0], A.row.astype(np.int32), A.col.astype(np.int32),
                               A.data.astype(np.float64), MatrixType.COO)
        t_factor = time.perf_counter() - t0

        def solve(b):
            x = np.empty_like(b)
            chol.solve(np.ascontiguousarray(b), x)
            return x

        prof = BlockProfile()
        t0 = time.perf_counter()
        block_eigensolve(L, M.diagonal(), k, sigma, solve, profile=prof)
        total = time.perf_counter() - t0
    parts = "  ".join(f"{p} {prof.seconds[p]:.2f}" for p in PARTS)
    return (f"factorisation {t_factor:.2f}  {parts}  (block total {total:.2f}; "
            f"{prof.n_solves} solves, {prof.restarts} restarts, {prof.full_passes} full passes)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="*", default=[10_000, 40_000, 160_000])
    ap.add_argument("--quick", action="store_true", help="skip meshes above 100k vertices")
    ap.add_argument("--k", type=int, default=100)
    ap.add_argument("--repeats", type=int, default=1)
    ap.add_argument("--needle", type=int, default=5, help="icosphere level of the needle mesh (0: skip)")
    ap.add_argument("--no-real", action="store_true", help="skip the large-intestine surfaces")
    args = ap.parse_args()
    print(f"load average at start: {' '.join(f'{x:.2f}' for x in os.getloadavg())} "
          f"({os.cpu_count()} cores)")
    print(f"{'mesh':>14} {'vertices':>9} {'k':>4} {'threads':>8} {'eigsh s':>8} {'surfacekit s':>13} "
          f"{'ratio':>6} {'max rel diff':>13} {'residual/bound':>15}  solver", flush=True)
    profiles = []
    for name, s in cases(args):
        L, M = sk.laplacian(s)
        for label, threads in (("1", 1), ("default", None)):
            r = compare(s, L, M, args.k, threads, args.repeats)
            zeros = f" ({r['zeros']} zero)" if r["zeros"] > 1 else ""
            print(f"{name:>14} {s.n_vertices:>9} {args.k:>4} {label:>8} {r['ref']:>8.2f} "
                  f"{r['ours']:>13.2f} {r['ratio']:>6.2f} {r['diff']:>13.1e} {r['res']:>15.2f}  "
                  f"{r['solver']}{zeros}", flush=True)
        if r["solver"].startswith("block"):
            profiles.append((name, profile(L, M, args.k)))
    print("\nwhere the block solver's time goes (seconds, one thread):")
    for name, line in profiles:
        print(f"{name:>14}  {line}", flush=True)
    print(f"load average at end: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")


if __name__ == "__main__":
    main()
