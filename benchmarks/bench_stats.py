"""Cohort-statistics timing: 100 subjects x 10k vertices, 5000 permutations.

Prints the time of `sk.vertexwise_group_test` (max-T, with and without a
covariate) and of GPA + PCA shape model on the same cohort size, and a ratio
against a baseline measured in the same run: a straightforward per-permutation
loop calling scipy.stats.ttest_ind (vectorised over vertices), timed on a subset
of permutations and extrapolated linearly.  Synthetic random data only.

Run:  python benchmarks/bench_stats.py [--subjects 100] [--vertices 10000] [--permutations 5000]
Timings on a shared machine are inflated by other processes; ratios are more stable.
"""
from __future__ import annotations

import argparse

import numpy as np
from _timing import Timer  # benchmarks/ is on sys.path when run as a script
from scipy import stats

import surfacekit as sk


def baseline_loop(a: np.ndarray, b: np.ndarray, n_perm: int, seed: int = 0) -> Timer:
    """Time of n_perm permutations of a plain loop."""
    y = np.vstack([a, b])
    n_a = a.shape[0]
    rng = np.random.default_rng(seed)
    max_t = np.empty(n_perm)
    with Timer() as t:
        for i in range(n_perm):
            p = rng.permutation(y.shape[0])
            max_t[i] = np.abs(stats.ttest_ind(y[p[:n_a]], y[p[n_a:]]).statistic).max()
    return t


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--subjects", type=int, default=100)
    ap.add_argument("--vertices", type=int, default=10_000)
    ap.add_argument("--permutations", type=int, default=5000)
    ap.add_argument("--baseline-permutations", type=int, default=100)
    args = ap.parse_args()
    n, v, n_perm = args.subjects, args.vertices, args.permutations
    rng = np.random.default_rng(0)
    y = rng.standard_normal((n, v))
    y[: n // 2, : v // 20] += 1.0
    a, b = y[: n // 2], y[n // 2:]
    age = rng.normal(60, 10, n)

    with Timer() as t_ours:
        res = sk.vertexwise_group_test(a, b, n_permutations=n_perm, seed=1)
    with Timer() as t_cov:
        sk.vertexwise_group_test(a, b, n_permutations=n_perm, seed=1, covariates=age)
    part = baseline_loop(a, b, args.baseline_permutations)
    scale = n_perm / args.baseline_permutations
    base_wall, base_cpu = part.wall * scale, part.cpu * scale

    shapes_rng = np.random.default_rng(1)
    template = shapes_rng.normal(scale=30.0, size=(v, 3))
    shapes = np.stack([template @ sk.synthetic.random_rotation(i).T
                       + shapes_rng.normal(scale=1.0, size=(v, 3)) for i in range(n)])
    with Timer() as t_gpa:
        gpa = sk.generalized_procrustes(shapes, scaling=False)
    with Timer() as t_pca:
        sk.shape_model(gpa.aligned, align=False)

    print(f"cohort: {n} subjects x {v} vertices, {n_perm} permutations")
    print(f"group test (max-T, no covariate): {t_ours}  "
          f"({res.significant().sum()} vertices with p_fwer < 0.05)")
    print(f"group test (max-T, 1 covariate):  {t_cov}")
    print(f"baseline loop, scipy ttest_ind per permutation (extrapolated from "
          f"{args.baseline_permutations}): {base_wall:8.2f} s wall, {base_cpu:8.2f} s CPU")
    print(f"speed-up over the baseline: {base_wall / t_ours.wall:6.1f} x wall, "
          f"{base_cpu / t_ours.cpu:6.1f} x CPU")
    print(f"GPA ({gpa.n_iter} iterations):            {t_gpa}")
    print(f"PCA shape model:                  {t_pca}")
    print(f"total cohort statistics:          {t_ours.wall + t_gpa.wall + t_pca.wall:8.2f} s wall, "
          f"{t_ours.cpu + t_gpa.cpu + t_pca.cpu:8.2f} s CPU")


if __name__ == "__main__":
    main()
