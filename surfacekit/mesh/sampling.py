"""Farthest-point sampling: well-spread subsets of points or vertices.

One greedy loop (:func:`greedy_farthest`) serves both metrics: Euclidean here
(:func:`farthest_points`, used by the correspondence solver) and geodesic in
:func:`surfacekit.mesh.geodesics.farthest_point_sampling`.
"""
from __future__ import annotations

from collections.abc import Callable

import numpy as np


def greedy_farthest(first: int, n: int, distance_to: Callable[[int], np.ndarray],
                    eligible: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The greedy k-centre loop: start at `first`, then repeatedly take the point
    farthest from all chosen so far (Gonzalez, Theor. Comput. Sci. 1985).

    Parameters
    ----------
    first : index of the first sample
    n : number of samples
    distance_to : ``distance_to(i)`` gives the (p,) distances (or any increasing
        function of them) of every point to point i, 0 at i itself
    eligible : optional (p,) bool, the points that may be chosen

    Returns
    -------
    samples (n,) int64 in selection order, and the (p,) distance of every point to
    its nearest sample (0 at the samples).
    """
    samples = np.empty(n, dtype=np.int64)
    samples[0] = first
    nearest = distance_to(first)
    for k in range(1, n):
        candidates = nearest if eligible is None else np.where(eligible, nearest, -1.0)
        samples[k] = int(np.argmax(candidates))
        np.minimum(nearest, distance_to(samples[k]), out=nearest)
    return samples, nearest


def farthest_points(points: np.ndarray, n: int, *, seed: int = 0, exact: bool = False
                    ) -> np.ndarray:
    """Indices of n points chosen by farthest-point sampling (Euclidean).

    Greedy 2-approximation of the k-centre problem (Gonzalez, Theor. Comput. Sci.
    1985): start from a seeded random point, then repeatedly add the point farthest
    from those chosen.  points (p, 3) mm; returns (n,) int64, no repeats when
    n <= p.  O(n p) time; each step is vectorised over the points.  Unless `exact`,
    sampling from more than 4n points runs on a seeded random subset of 4n.
    """
    pts = np.asarray(points, dtype=np.float64)
    p = len(pts)
    n = int(min(n, p))
    rng = np.random.default_rng(seed)
    if p > 4 * n and not exact:  # FPS among a random 4n-subset: same spread, a fraction of the time
        pool = np.sort(rng.choice(p, 4 * n, replace=False))
        return pool[farthest_points(pts[pool], n, seed=seed, exact=True)]
    # squared distances: the same choices as distances, without square roots
    first = int(rng.integers(p))
    return greedy_farthest(first, n, lambda i: np.sum((pts - pts[i]) ** 2, axis=1))[0]
