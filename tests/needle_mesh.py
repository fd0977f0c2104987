"""A closed surface with needle triangles and vertices of near-zero mass, for solver tests.

An icosphere in which chosen triangles (a, b, c) are split at a point q a fraction
``delta`` of the way from a, and the resulting sliver (a, b, q) is split again at a
point p inside it: p's three triangles have areas of order ``delta`` times the
original, so its lumped mass is near zero, and all of them are needles.  Every new
point lies in the plane of its triangle, so the shape (a sphere) is unchanged.
"""
from __future__ import annotations

import numpy as np

import surfacekit as sk


def needle_sphere(subdivisions: int = 4, n_split: int = 200, delta: float = 1e-8,
                  seed: int = 0) -> sk.Surface:
    """Unit icosphere with `n_split` triangles split into needles (see the module docstring)."""
    s = sk.synthetic.icosphere(subdivisions)
    v, f = s.vertices, s.faces
    pick = np.random.default_rng(seed).choice(len(f), n_split, replace=False)
    a, b, c = f[pick, 0], f[pick, 1], f[pick, 2]
    u, w = v[b] - v[a], v[c] - v[a]
    q = v[a] + delta * (u + w)  # barycentric (δ, δ) from a: near the corner a
    p = v[a] + delta * (0.95 * u + 0.15 * w)  # inside the sliver (a, b, q)
    iq = len(v) + np.arange(n_split)
    ip = iq + n_split
    keep = np.ones(len(f), bool)
    keep[pick] = False
    new = [np.stack(t, axis=1) for t in ((b, c, iq), (c, a, iq), (a, b, ip), (b, iq, ip), (iq, a, ip))]
    return sk.Surface(np.vstack([v, q, p]), np.vstack([f[keep]] + new))
