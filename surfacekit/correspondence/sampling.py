"""Well-spread vertex subsets used to make the matching fast."""
from __future__ import annotations

import numpy as np


def farthest_points(points: np.ndarray, n: int, *, seed: int = 0, exact: bool = False) -> np.ndarray:
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
    chosen = np.empty(n, dtype=np.int64)
    chosen[0] = rng.integers(p)
    d2 = np.sum((pts - pts[chosen[0]]) ** 2, axis=1)
    for k in range(1, n):
        chosen[k] = int(np.argmax(d2))
        np.minimum(d2, np.sum((pts - pts[chosen[k]]) ** 2, axis=1), out=d2)
    return chosen
