"""Spectral upsampling (ZoomOut) and point-map recovery from functional maps."""
from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree


def nearest_rows(query: np.ndarray, data: np.ndarray, *, chunk: int = 2048,
                 return_distance: bool = False):
    """Index of the nearest row of `data` for each row of `query` (Euclidean).

    query (q, d), data (p, d).  A k-d tree for d <= 8, otherwise blocked
    ``|a|² + |b|² - 2 a·b`` products (k-d trees degrade to brute force in high
    dimension, and BLAS does brute force faster).  Returns (q,) int64
    (and the (q,) distances with ``return_distance``).
    """
    query = np.ascontiguousarray(query, dtype=np.float64)
    data = np.ascontiguousarray(data, dtype=np.float64)
    if data.shape[1] > 12:  # single precision halves the cost of the products
        query, data = query.astype(np.float32), data.astype(np.float32)
    if data.shape[1] <= 12:
        d, idx = cKDTree(data).query(query)
        return (idx.astype(np.int64), d) if return_distance else idx.astype(np.int64)
    dn = np.einsum("ij,ij->i", data, data)
    dist = np.empty(len(query), dtype=np.float64)
    idx = np.empty(len(query), dtype=np.int64)
    for start in range(0, len(query), chunk):
        q = query[start:start + chunk]
        d2 = dn[None, :] - 2.0 * (q @ data.T)
        j = np.argmin(d2, axis=1)
        idx[start:start + chunk] = j
        dist[start:start + chunk] = d2[np.arange(len(q)), j] + np.einsum("ij,ij->i", q, q)
    return (idx, np.sqrt(np.maximum(dist, 0.0))) if return_distance else idx


def nearest_rows_local(query: np.ndarray, data: np.ndarray, query_xyz: np.ndarray,
                       data_xyz: np.ndarray, n_candidates: int = 16) -> np.ndarray:
    """Nearest row of `data` for each row of `query`, searched among spatial neighbours only.

    For each query, the `n_candidates` rows whose 3-D positions (`data_xyz` (p, 3))
    are closest to the query's position (`query_xyz` (q, 3)) are compared in the
    full embedding.  Exact whenever the true nearest row is among them, which holds
    when the positions are aligned and weigh heavily in the embedding; O(q·c·d)
    instead of O(q·p·d).  Returns (q,) int64.
    """
    c = min(n_candidates, len(data))
    _, cand = cKDTree(data_xyz).query(query_xyz, k=c)
    cand = cand.reshape(len(query), c)
    data32 = np.asarray(data, dtype=np.float32)
    dn = np.einsum("ij,ij->i", data32, data32)
    d2 = dn[cand] - 2.0 * np.einsum("qcd,qd->qc", data32[cand], np.asarray(query, dtype=np.float32))
    return cand[np.arange(len(query)), np.argmin(d2, axis=1)].astype(np.int64)


def fmap_from_pointmap(phi_t: np.ndarray, phi_s: np.ndarray, t2s: np.ndarray,
                       s2t: np.ndarray | None = None) -> np.ndarray:
    """Functional map C (k_t, k_s) from point maps by least squares, ``Φ_t C ≈ Φ_s[t2s]``.

    With `s2t` given, the rows ``Φ_t[s2t] C ≈ Φ_s`` are added, so both map directions
    must agree — the bijectivity-favouring variant (in the spirit of the two-way
    maps of Ren, Melzi, Wonka & Ovsjanikov, ACM TOG 2021).  phi_t (q, k_t) and
    phi_s (p, k_s) are eigenvectors restricted to the (sub)sampled vertices.
    """
    A, B = phi_t, phi_s[t2s]
    if s2t is not None:
        A = np.vstack([A, phi_t[s2t]])
        B = np.vstack([B, phi_s])
    # normal equations: A has few, well-conditioned columns (sampled eigenvectors),
    # and this is far cheaper than an SVD-based least-squares solve
    AtA = A.T @ A
    AtA[np.diag_indices_from(AtA)] += 1e-9 * np.trace(AtA) / len(AtA)
    return np.linalg.solve(AtA, A.T @ B)


def pointmaps_from_fmap(C: np.ndarray, phi_t: np.ndarray, phi_s: np.ndarray,
                        extra_t: np.ndarray | None = None, extra_s: np.ndarray | None = None,
                        both: bool = True):
    """Point maps from a functional map by nearest neighbours in aligned embeddings.

    Target vertex j is matched to the source vertex whose row ``Φ_s[i]`` is
    nearest to ``(Φ_t C)[j]`` (Ovsjanikov et al., SIGGRAPH 2012, Sec. 6.1).  Optional
    `extra_t` (q, e) / `extra_s` (p, e) columns (e.g. weighted aligned coordinates)
    are appended to both embeddings.  Returns ``(t2s (q,), s2t (p,) or None)``.
    """
    emb_t = phi_t @ C
    emb_s = phi_s[:, : C.shape[1]]
    if extra_t is not None:
        emb_t = np.hstack([emb_t, extra_t])
        emb_s = np.hstack([emb_s, extra_s])
        # heavy coordinates (spread >> spectral row norm ~sqrt(k)): search near in space only
        if extra_t.shape[1] == 3 and np.std(extra_t) > np.sqrt(C.shape[0]):
            t2s = nearest_rows_local(emb_t, emb_s, extra_t, extra_s)
            s2t = nearest_rows_local(emb_s, emb_t, extra_s, extra_t) if both else None
            return t2s, s2t
    t2s = nearest_rows(emb_t, emb_s)
    s2t = nearest_rows(emb_s, emb_t) if both else None
    return t2s, s2t


def zoomout(phi_t: np.ndarray, phi_s: np.ndarray, t2s: np.ndarray, *, ks, bijective: bool = True,
            coords_t: np.ndarray | None = None, coords_s: np.ndarray | None = None,
            coord_weight: float = 0.0, s2t: np.ndarray | None = None,
            fixed: tuple[np.ndarray, np.ndarray] | None = None):
    """ZoomOut spectral upsampling (Melzi, Ren, Rodolà, Sharma, Wonka & Ovsjanikov, ACM TOG / SIGGRAPH Asia 2019).

    Alternates, for each k in `ks` (increasing): the k x k functional map of the
    current point maps, then new point maps by nearest neighbours in the
    k-dimensional spectral embeddings.  Run on well-spread vertex samples for speed.

    Parameters
    ----------
    phi_t, phi_s : (q, K), (p, K) eigenvectors at the sampled target/source vertices,
        scaled to unit surface area so that both shapes' embeddings are comparable
    t2s : (q,) initial target-to-source map (indices into the source samples)
    ks : increasing spectral sizes, e.g. ``range(6, 61, 3)``
    bijective : estimate each C from both map directions (see :func:`fmap_from_pointmap`)
    coords_t, coords_s : (q, 3), (p, 3) aligned, normalised coordinates appended to
        the embeddings with weight `coord_weight`
    s2t : (p,) optional initial source-to-target map
    fixed : optional ``(target_rows (l,), source_rows (l,))`` known pairs (landmarks),
        imposed on both point maps at every step

    Returns
    -------
    C : (k, k) final functional map; t2s (q,); s2t (p,)
    """
    ks = list(ks)
    use_coords = coords_t is not None and coord_weight > 0
    for k in ks:
        C = fmap_from_pointmap(phi_t[:, :k], phi_s[:, :k], t2s, s2t if bijective else None)
        if use_coords:
            t2s, s2t = pointmaps_from_fmap(C, phi_t[:, :k], phi_s[:, :k], coord_weight * coords_t,
                                           coord_weight * coords_s)
        else:
            t2s, s2t = pointmaps_from_fmap(C, phi_t[:, :k], phi_s[:, :k])
        if fixed is not None:
            t2s[fixed[0]] = fixed[1]
            s2t[fixed[1]] = fixed[0]
    C = fmap_from_pointmap(phi_t[:, :ks[-1]], phi_s[:, :ks[-1]], t2s, s2t if bijective else None)
    return C, t2s, s2t
