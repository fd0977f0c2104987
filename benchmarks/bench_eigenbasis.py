"""Eigenbasis speed: surfacekit's solver beside scipy's default shift-invert eigsh, same run.

Run:  python benchmarks/bench_eigenbasis.py [--sizes 10000 40000 160000] [--k 100]
      [--needle 4] [--needle-k 60]

For each size, a unit-area-ish sphere-like surface (Fibonacci triangulation of an
ellipsoid) is built; then a sphere with needle triangles and vertices of near-zero
mass (tests/needle_mesh.py, icosphere subdivision level --needle, 0 to skip), the case
where a shift taken from the mean of diag(L)/diag(M) was far too large.  Both solvers
get the same (L, M) and the same shift σ.  The
baseline is ``scipy.sparse.linalg.eigsh(L, k, M, sigma=σ)``, which factorises
``L - σM`` with SuperLU internally.  Printed: seconds for each, the speed ratio and
the largest relative eigenvalue difference (target: ratio >= 2 at 40k, diff <= 1e-6).

surfacekit pins BLAS to one thread during the ARPACK iterations; the baseline is
timed twice, with the environment's default BLAS threads (what a user gets) and
pinned to one thread too, so the gain from the factorisation alone is visible.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
import scipy.sparse.linalg as spla
from threadpoolctl import threadpool_limits

import surfacekit as sk
from surfacekit.mesh.eigen import eigen_shift

# the needle mesh is built by a helper of the test suite; benchmarks are scripts beside it
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from needle_mesh import needle_sphere


def run(s: sk.Surface, k: int, solver: str, repeats: int) -> dict:
    L, M = sk.laplacian(s)
    sigma = eigen_shift(L, M)
    rng = np.random.default_rng(0)
    v0 = rng.standard_normal(s.n_vertices)
    t_ref, t_ref1 = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        w_ref = spla.eigsh(L, k=k, M=M, sigma=sigma, v0=v0, which="LM")[0]
        t_ref.append(time.perf_counter() - t0)
        with threadpool_limits(1):
            t0 = time.perf_counter()
            spla.eigsh(L, k=k, M=M, sigma=sigma, v0=v0, which="LM")
            t_ref1.append(time.perf_counter() - t0)
    t_ours = []
    for _ in range(repeats):
        s.cache = {key: val for key, val in s.cache.items() if key[0] != "eigenbasis"}
        t0 = time.perf_counter()
        basis = sk.eigenbasis(s, k, solver=solver)
        t_ours.append(time.perf_counter() - t0)
    w_ref = np.sort(w_ref)
    rel = np.abs(basis.values[1:] - w_ref[1:]) / np.abs(w_ref[1:])
    return {"n": s.n_vertices, "sigma": sigma, "scipy_s": min(t_ref), "ours_s": min(t_ours),
            "scipy1_s": min(t_ref1), "ratio1": min(t_ref1) / min(t_ours),
            "ratio": min(t_ref) / min(t_ours), "max_rel_diff": float(rel.max()), "solver": basis.solver}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="*", default=[10_000, 40_000, 160_000])
    ap.add_argument("--k", type=int, default=100)
    ap.add_argument("--solver", default="auto")
    ap.add_argument("--repeats", type=int, default=1)
    ap.add_argument("--needle", type=int, default=4, help="icosphere level of the needle mesh (0: skip)")
    ap.add_argument("--needle-k", type=int, default=60)
    args = ap.parse_args()
    print(f"{'mesh':>9} {'vertices':>9} {'k':>4} {'shift':>10} {'scipy eigsh s':>14} {'(1 thread) s':>13} "
          f"{'surfacekit s':>13} {'ratio':>7} {'(1 thread)':>11} {'max rel diff':>13}  solver")
    cases = [("ellipsoid", args.k, sk.synthetic.ellipsoid((30.0, 20.0, 15.0), n=n, seed=1, jitter=0.2))
             for n in args.sizes]
    if args.needle:
        cases.append(("needles", args.needle_k, needle_sphere(args.needle)))
    for name, k, s in cases:
        r = run(s, k, args.solver, args.repeats)
        print(f"{name:>9} {r['n']:>9} {k:>4} {r['sigma']:>10.1e} {r['scipy_s']:>14.2f} "
              f"{r['scipy1_s']:>13.2f} {r['ours_s']:>13.2f} {r['ratio']:>7.2f} {r['ratio1']:>11.2f} "
              f"{r['max_rel_diff']:>13.1e}  {r['solver']}", flush=True)


if __name__ == "__main__":
    main()
