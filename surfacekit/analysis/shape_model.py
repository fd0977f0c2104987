"""Cohort shape statistics on corresponded surfaces: Procrustes alignment and PCA shape models.

Shapes are (s, n, 3) arrays: s subjects, n corresponding vertices (mm), e.g.
``subject.vertices[corr.source_to_target]`` for a template -> subject map; or chunked
arrays of that shape (a Dask array such as a cohort field store's ``shapes``), which
are read a block of subjects or of coordinates at a time (:mod:`.chunked`), so memory
does not grow with the number of subjects.
For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..correspondence.alignment import Transform, weighted_umeyama
from .chunked import column_width, is_chunked, loaded, rows_of

CHUNKED_MAX_MODES = 100  # modes kept by default from chunked shapes (each is 3n float64 values)


def _check_shapes(shapes, min_subjects: int = 2):
    """The shapes as float64 numpy (checked now) or chunked (rows checked as they are read)."""
    x = shapes if is_chunked(shapes) else np.asarray(shapes, dtype=np.float64)
    if len(x.shape) != 3 or x.shape[2] != 3:
        raise ValueError(f"shapes must have shape (subjects, vertices, 3), got {tuple(x.shape)}")
    if x.shape[0] < min_subjects or x.shape[1] < 3:
        raise ValueError(f"need at least {min_subjects} shapes of at least 3 vertices, "
                         f"got {x.shape[0]} shapes of {x.shape[1]}")
    if not is_chunked(x) and not np.all(np.isfinite(x)):
        raise ValueError("shapes contain NaN or infinite coordinates")
    return x


def _rows(x):
    """(i, shape i) for every subject; rows of chunked shapes are checked for finiteness."""
    for i, row in rows_of(x):
        if is_chunked(x) and not np.all(np.isfinite(row)):
            raise ValueError(f"shape {i} contains NaN or infinite coordinates")
        yield i, row


def _apply_transforms(block, transforms, block_info=None):
    """A block of subjects moved by their transforms (for Dask's ``map_blocks``)."""
    start = block_info[0]["array-location"][0][0]
    rows = np.asarray(block, dtype=np.float64)
    return np.stack([transforms[start + j].apply(row) for j, row in enumerate(rows)])


@dataclass
class ProcrustesResult:
    """Result of :func:`generalized_procrustes`.

    aligned : (s, n, 3) shapes in the common frame (mm; scaled to the mean
        centroid size of the inputs when ``scaling=True``)
    mean : (n, 3) Procrustes mean shape (mm)
    transforms : s `Transform` objects, ``aligned[i] = transforms[i].apply(shapes[i])``
    centroid_sizes : (s,) input centroid sizes (mm), sqrt of the summed squared distances to the centroid
    n_iter, converged : iterations used and whether the mean converged
    """

    aligned: np.ndarray
    mean: np.ndarray
    transforms: list
    centroid_sizes: np.ndarray
    n_iter: int
    converged: bool


def generalized_procrustes(shapes, *, scaling: bool = True, weights: np.ndarray | None = None,
                           max_iter: int = 100, tol: float = 1e-10) -> ProcrustesResult:
    """Generalised Procrustes analysis of corresponded shapes.

    Iterative algorithm of Gower (Psychometrika 1975) as described by Dryden &
    Mardia (*Statistical Shape Analysis*, Wiley 2016, §7.3): centre, scale to unit
    centroid size, then repeatedly align every shape to the current mean by
    weighted Kabsch/Umeyama (similarity when `scaling`, rigid otherwise),
    average, re-normalise the mean, until the mean moves less than `tol`.

    Parameters
    ----------
    shapes : (s, n, 3) corresponded vertex coordinates (mm), s >= 2; a chunked array is
        read a block of subjects at a time in each iteration, and `aligned` is then a
        lazy Dask array
    scaling : remove size as well as pose (default) — size is then reported in
        `centroid_sizes`; with False only rotation and translation are removed
    weights : (n,) non-negative vertex weights (e.g. template vertex areas), optional
    max_iter, tol : iteration limit and convergence tolerance (relative to unit size)

    Returns
    -------
    ProcrustesResult
    """
    x = _check_shapes(shapes)
    s, n, _ = x.shape
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64)
    if w.shape != (n,) or np.any(w < 0) or not w.sum() > 0:
        raise ValueError(f"weights must be (n={n},) non-negative with a positive sum")
    wn = w / w.sum()
    centroids, sizes = np.empty((s, 3)), np.empty(s)
    for i, row in _rows(x):  # one pass; chunked shapes are read again in each iteration
        centroids[i] = np.einsum("j,jk->k", wn, row)
        centred = row - centroids[i]
        sizes[i] = np.sqrt(np.einsum("jk,jk->", centred, centred))
    if np.any(sizes <= 0):
        raise ValueError("a shape has all its vertices at one point")
    scale = sizes if scaling else np.full(s, sizes.mean())

    def units():
        for i, row in _rows(x):
            yield i, (row - centroids[i]) / scale[i]

    def size(a):
        return float(np.sqrt(np.sum(a * a)))

    mean = next(units())[1].copy()
    converged, it = False, 0
    fits = [(np.eye(3), np.zeros(3), 1.0)] * s
    for it in range(1, max_iter + 1):
        new_mean = np.zeros((n, 3))
        for i, unit in units():
            fits[i] = f = weighted_umeyama(unit, mean, w, scaling=scaling)
            new_mean += f[2] * unit @ f[0].T + f[1]
        new_mean /= s
        new_mean -= wn @ new_mean
        if scaling:
            new_mean /= size(new_mean)
        delta = size(new_mean - mean)
        mean = new_mean
        if delta < tol:
            converged = True
            break
    fits = [weighted_umeyama(unit, mean, w, scaling=scaling) for _, unit in units()]
    # Back to mm: the common frame is scaled by the mean input size.
    unit_to_mm = sizes.mean()
    transforms = []
    for i, (rot, t, sc) in enumerate(fits):
        total_scale = sc / scale[i] * unit_to_mm
        trans = unit_to_mm * t - total_scale * rot @ centroids[i]
        transforms.append(Transform(rot, trans, float(total_scale)))
    if is_chunked(x):  # aligned lazily, subject by subject
        aligned = x.map_blocks(_apply_transforms, transforms, dtype=np.float64)
    else:
        aligned = np.stack([t.apply(x[i]) for i, t in enumerate(transforms)])
    return ProcrustesResult(aligned, mean * unit_to_mm, transforms, sizes, it, converged)


@dataclass
class ShapeModel:
    """A linear (PCA) shape model: ``shape ≈ mean + Σ_m b_m · modes[m]``.

    Attributes
    ----------
    mean : (n, 3) mm
    modes : (k, n, 3) orthonormal modes of variation (unit norm over all 3n coordinates)
    variances : (k,) variance along each mode (mm², sample variance, ddof = 1), descending
    training : (s, n, 3) the (aligned) training shapes, kept for the quality measures
    """

    mean: np.ndarray
    modes: np.ndarray
    variances: np.ndarray
    training: np.ndarray

    @property
    def n_modes(self) -> int:
        return int(self.variances.shape[0])

    @property
    def explained_variance_ratio(self) -> np.ndarray:
        """(k,) fraction of the total variance carried by each mode."""
        total = self.variances.sum()
        return self.variances / total if total > 0 else np.zeros_like(self.variances)

    def project(self, shape: np.ndarray, n_modes: int | None = None) -> np.ndarray:
        """Mode coefficients b (k,) of an (n, 3) shape in the model frame (mm)."""
        k = self.n_modes if n_modes is None else int(n_modes)
        d = np.asarray(shape, dtype=np.float64) - self.mean
        return self.modes[:k].reshape(k, -1) @ d.ravel()

    def reconstruct(self, coefficients: np.ndarray) -> np.ndarray:
        """(n, 3) shape from mode coefficients (the first len(coefficients) modes)."""
        b = np.atleast_1d(np.asarray(coefficients, dtype=np.float64))
        return self.mean + np.tensordot(b, self.modes[: len(b)], axes=1)

    def sample(self, n_samples: int, *, n_modes: int | None = None, seed: int = 0) -> np.ndarray:
        """(n_samples, n, 3) random shapes with b_m ~ N(0, variances[m]) (Gaussian model)."""
        k = self.n_modes if n_modes is None else int(n_modes)
        rng = np.random.default_rng(seed)
        b = rng.standard_normal((n_samples, k)) * np.sqrt(self.variances[:k])
        return self.mean + np.tensordot(b, self.modes[:k], axes=1)

    def save(self, path):
        """Save to NPZ (no pickle); reload with :meth:`load`."""
        from ..io.files import save_fields

        return save_fields(path, mean=self.mean, modes=self.modes, variances=self.variances,
                           training=self.training)

    @classmethod
    def load(cls, path) -> ShapeModel:
        from ..io.files import load_fields

        try:
            a = load_fields(path)
            return cls(a["mean"], a["modes"], a["variances"], a["training"])
        except (KeyError, ValueError, OSError) as exc:
            raise ValueError(f"{path} is not a saved ShapeModel: {exc}") from None

    # ------------------------------------------------------------ model quality
    def compactness(self) -> np.ndarray:
        """(k,) cumulative variance fraction C(M) for M = 1..k (Davies et al., IEEE TMI 2002)."""
        return np.cumsum(self.explained_variance_ratio)

    def generalisation(self, max_modes: int | None = None) -> np.ndarray:
        """(M,) leave-one-out reconstruction error G(M), mean per-vertex distance (mm).

        For each training shape, a model built from the others reconstructs it
        with M = 1..max_modes modes (Davies, Twining, Cootes, Waterton & Taylor,
        IEEE TMI 2002, who use the squared norm; the mean vertex distance in mm is
        the common practice for reporting).  Shapes stay in the frame of the full
        alignment (no re-alignment per fold).
        """
        x = self.training
        s = x.shape[0]
        if s < 3:
            raise ValueError("generalisation needs at least 3 training shapes")
        m_max = min(s - 2, self.n_modes if max_modes is None else int(max_modes))
        errors = np.zeros(m_max)
        for i in range(s):
            rest = np.delete(x, i, axis=0).reshape(s - 1, -1)
            mean = rest.mean(axis=0)
            _, phi = _pca(rest - mean, m_max)
            d = x[i].ravel() - mean
            recon = np.cumsum(phi.T * (phi @ d), axis=1).T  # (m_max, 3n): rank-M projections
            err = d[None, :] - recon
            errors += np.linalg.norm(err.reshape(m_max, -1, 3), axis=2).mean(axis=1)
        return errors / s

    def specificity(self, n_samples: int = 200, *, max_modes: int | None = None,
                    seed: int = 0) -> np.ndarray:
        """(M,) specificity S(M): mean distance (mm) from random model shapes to the nearest training shape.

        Samples with M = 1..max_modes modes, b_m ~ N(0, λ_m) (Davies et al. 2002);
        the distance is the mean per-vertex Euclidean distance (common practice).
        """
        m_max = self.n_modes if max_modes is None else min(int(max_modes), self.n_modes)
        out = np.zeros(m_max)
        rng = np.random.default_rng(seed)
        z = rng.standard_normal((n_samples, m_max))
        for m in range(1, m_max + 1):
            b = z[:, :m] * np.sqrt(self.variances[:m])
            samples = self.mean + np.tensordot(b, self.modes[:m], axes=1)  # (N, n, 3)
            dist = np.stack([np.linalg.norm(samples - t, axis=2).mean(axis=1)
                             for t in self.training], axis=1)            # (N, s)
            out[m - 1] = dist.min(axis=1).mean()
        return out


def shape_model(shapes, *, n_modes: int | None = None, align: bool = True,
                scaling: bool = False) -> ShapeModel:
    """PCA shape model (point distribution model) of corresponded shapes.

    Principal component analysis of the aligned coordinates (Cootes, Taylor,
    Cooper & Graham, Computer Vision and Image Understanding 1995), computed by an
    SVD of the centred (s, 3n) data matrix.

    Parameters
    ----------
    shapes : (s, n, 3) corresponded vertex coordinates (mm), or a chunked array of them
        (e.g. a cohort field store's ``shapes(template.vertices)``): then the Gram matrix
        and the modes are accumulated over blocks of coordinates, memory ~ s² + k·3n
        values, and `training` stays a lazy Dask array
    n_modes : modes kept (default: all, at most s - 1; from chunked shapes at most
        :data:`CHUNKED_MAX_MODES`)
    align : remove pose first by :func:`generalized_procrustes`
    scaling : with `align`, also remove size (then the model describes shape only)

    Returns
    -------
    ShapeModel
    """
    x = _check_shapes(shapes)
    if align:
        x = generalized_procrustes(x, scaling=scaling).aligned
    s, n, _ = x.shape
    k_max = s - 1 if n_modes is not None or not is_chunked(x) else min(s - 1, CHUNKED_MAX_MODES)
    k = k_max if n_modes is None else min(int(n_modes), k_max)
    if k < 1:
        raise ValueError(f"n_modes must be >= 1, got {n_modes}")
    if not is_chunked(x):
        mean = x.mean(axis=0)
        variances, modes = _pca((x - mean).reshape(s, -1), k)
        return ShapeModel(mean, modes.reshape(k, n, 3), variances, x)
    mean = np.zeros((n, 3))
    for _, row in _rows(x):
        mean += row
    mean /= s
    centred = (x - mean).reshape(s, 3 * n)
    width = column_width(s)
    gram = np.zeros((s, s))
    for c0 in range(0, 3 * n, width):
        block = loaded(centred[:, c0:c0 + width])
        gram += block @ block.T
    evals, vecs = _top_eigen(gram, k)
    modes = np.empty((k, 3 * n))
    for c0 in range(0, 3 * n, width):
        modes[:, c0:c0 + width] = vecs.T @ loaded(centred[:, c0:c0 + width])
    variances, modes = _unit_modes(modes, evals, s)
    return ShapeModel(mean, modes.reshape(k, n, 3), variances, x)


def _top_eigen(gram: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """The k largest eigenvalues (clipped at 0) of a Gram matrix and their eigenvectors."""
    evals, evecs = np.linalg.eigh(gram)
    order = np.argsort(evals)[::-1][:k]
    return np.maximum(evals[order], 0.0), evecs[:, order]


def _pca(centred: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Top-k sample variances (k,) and unit modes (k, d) of centred (s, d) data, s << d.

    Through the (s, s) Gram matrix (the "snapshot" form; Sirovich, Q. Appl. Math.
    1987): its eigenvectors V give the modes ``Dᵀ V / sqrt(eigenvalue)``.
    """
    evals, vecs = _top_eigen(centred @ centred.T, k)
    return _unit_modes((centred.T @ vecs).T, evals, centred.shape[0])


def _unit_modes(modes: np.ndarray, evals: np.ndarray, s: int) -> tuple[np.ndarray, np.ndarray]:
    """Sample variances and the modes ``Dᵀ V`` scaled to unit norm, each with a fixed sign."""
    norms = np.linalg.norm(modes, axis=1)
    modes = np.divide(modes, norms[:, None], out=np.zeros_like(modes), where=norms[:, None] > 0)
    # deterministic sign: the largest-magnitude coordinate of each mode is positive
    signs = np.sign(modes[np.arange(len(modes)), np.abs(modes).argmax(axis=1)])
    modes = modes * np.where(signs == 0, 1.0, signs)[:, None]
    return evals / (s - 1), modes


def spectral_distances(surfaces, k: int = 50, *, weighted: bool = True) -> np.ndarray:
    """(s, s) pairwise Laplace spectrum distances between subjects (no correspondence needed).

    Each surface's first k area-normalised Laplace–Beltrami eigenvalues
    (Reuter, Wolter & Peinecke, Computer-Aided Design 2006; ``sk.laplace_spectrum``) are
    computed once, then compared by ``sk.spectrum_distance`` (dimensionless;
    invariant to rigid motion, isometric bending and uniform scale).

    Parameters
    ----------
    surfaces : sequence of Surface, or an (s, k) array of precomputed Laplace spectrum rows
    k : number of non-zero eigenvalues
    weighted : divide the i-th difference by i (see ``sk.spectrum_distance``)
    """
    from ..mesh.descriptors import laplace_spectrum, spectrum_distance

    if isinstance(surfaces, np.ndarray) and surfaces.ndim == 2:
        spectrum = np.asarray(surfaces, dtype=np.float64)
    else:
        surfaces = list(surfaces)
        if len(surfaces) < 2:
            raise ValueError(f"need at least 2 surfaces, got {len(surfaces)}")
        spectrum = np.stack([laplace_spectrum(s, k) for s in surfaces])
    s = spectrum.shape[0]
    out = np.zeros((s, s))
    for i in range(s):
        for j in range(i + 1, s):
            out[i, j] = out[j, i] = spectrum_distance(spectrum[i], spectrum[j], k, weighted=weighted)
    return out
