"""Rigid and similarity alignment of paired points, weighted and robust; the `Transform` object.

Used by the correspondence solver (candidate poses, ICP), to take the pose out
of a correspondence before measuring change, and by generalised Procrustes
analysis.  Convention: a transform maps *source* points onto *target* points,
``target ≈ scale * R @ source + t``.  :func:`kabsch` is the one least-squares
fit; every other fit here calls it.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..mesh.surface import Surface, SurfaceError

#: Tukey biweight tuning constant giving 95% efficiency under Gaussian residuals
#: (Beaton & Tukey, Technometrics 1974); residual scale from the MAD x 1.4826
#: (the Gaussian consistency factor of the median absolute deviation, Hampel 1974).
TUKEY_C = 4.685
MAD_TO_SD = 1.4826


@dataclass(frozen=True)
class Transform:
    """A similarity transform ``x -> scale * rotation @ x + translation``.

    Attributes
    ----------
    rotation : (3, 3) proper rotation (det +1)
    translation : (3,) mm
    scale : float, 1.0 for a rigid transform
    weights : (n,) final per-pair weights in [0, 1] (robust weight x confidence)
    rms : float, weighted root-mean-square residual after alignment (mm)
    n_iter : int, reweighting iterations used
    """

    rotation: np.ndarray
    translation: np.ndarray
    scale: float = 1.0
    weights: np.ndarray | None = None
    rms: float = 0.0
    n_iter: int = 0

    @property
    def matrix(self) -> np.ndarray:
        """(4, 4) homogeneous matrix of the transform."""
        m = np.eye(4)
        m[:3, :3] = self.scale * self.rotation
        m[:3, 3] = self.translation
        return m

    def __array__(self, dtype=None, copy=None):
        return self.matrix if dtype is None else self.matrix.astype(dtype)

    def apply(self, points: np.ndarray) -> np.ndarray:
        """Transform (n, 3) points (mm)."""
        p = np.asarray(points, dtype=np.float64)
        return self.scale * p @ self.rotation.T + self.translation

    def inverse(self) -> Transform:
        """The transform taking target points back onto the source (same weights and rms)."""
        r_inv = self.rotation.T
        return Transform(r_inv, -(r_inv @ self.translation) / self.scale, 1.0 / self.scale,
                         self.weights, self.rms, self.n_iter)

    def then(self, other: Transform) -> Transform:
        """The composition ``x -> other.apply(self.apply(x))`` (diagnostics taken from `other`)."""
        return Transform(other.rotation @ self.rotation,
                         other.scale * (other.rotation @ self.translation) + other.translation,
                         other.scale * self.scale, other.weights, other.rms, other.n_iter)

    def turned_about(self, turn: np.ndarray, centre: np.ndarray) -> Transform:
        """This transform followed by the rotation `turn` (3, 3) about the point `centre` (3,)."""
        return Transform(turn @ self.rotation, turn @ (self.translation - centre) + centre, self.scale)


def kabsch(a: np.ndarray, b: np.ndarray, w: np.ndarray | None = None,
           scaling: bool = False) -> tuple[np.ndarray, np.ndarray, float]:
    """Least-squares rotation R, translation t (and scale) with ``s R a + t ≈ b``.

    Minimises ``Σ w_i |b_i - (s R a_i + t)|²`` in closed form: the rotation from
    the SVD of the weighted cross-covariance with a reflection guard (Kabsch,
    Acta Cryst. A 1976); with ``scaling`` the similarity of Umeyama (IEEE TPAMI
    1991), scale ``s = tr(D S) / σ²_a`` (ibid., eq. 42).  a, b (n, 3); w (n,)
    optional non-negative weights.  Returns ``(R (3,3), t (3,), s)``; proper
    rotations only (det +1).  This is the solver's formula: every fit in the
    package goes through it, so the solver's numbers stay bit for bit the same.
    """
    w = np.ones(len(a)) if w is None else np.asarray(w, float)
    w = w / w.sum()
    ca, cb = w @ a, w @ b
    A, B = a - ca, b - cb
    H = (A * w[:, None]).T @ B
    U, S, Vt = np.linalg.svd(H)
    d = np.sign(np.linalg.det(Vt.T @ U.T)) or 1.0
    D = np.diag([1.0, 1.0, d])
    R = Vt.T @ D @ U.T
    s = float(np.trace(np.diag(S) @ D) / max(w @ np.sum(A * A, axis=1), 1e-300)) if scaling else 1.0
    t = cb - s * R @ ca
    return R, t, s


def weighted_umeyama(source: np.ndarray, target: np.ndarray, weights: np.ndarray | None = None,
                     *, scaling: bool = False) -> tuple[np.ndarray, np.ndarray, float]:
    """:func:`kabsch` (Kabsch 1976; Umeyama, IEEE TPAMI 1991) with its inputs checked.

    Parameters
    ----------
    source, target : (n, 3) paired points (mm)
    weights : (n,) non-negative, optional (uniform by default)
    scaling : also estimate an isotropic scale

    Returns
    -------
    rotation (3, 3), translation (3,) mm, scale (float; 1.0 when ``scaling`` is False)
    """
    x = np.asarray(source, dtype=np.float64)
    y = np.asarray(target, dtype=np.float64)
    w = np.ones(len(x)) if weights is None else np.asarray(weights, dtype=np.float64)
    if not w.sum() > 0:
        raise ValueError("alignment weights are all zero")
    if scaling and np.all(x == x[0]):
        raise ValueError("source points are all identical; scale is undefined")
    return kabsch(x, y, w, scaling=scaling)


def _paired_points(source, target, corr) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """Turn (arrays) or (surfaces + correspondence) into paired point arrays and confidences."""
    if isinstance(source, Surface) or isinstance(target, Surface):
        if not (isinstance(source, Surface) and isinstance(target, Surface)):
            raise SurfaceError("source and target must both be Surfaces or both (n, 3) arrays")
        if corr is None:
            raise ValueError("surfaces need the correspondence that pairs their vertices (corr=...); "
                             "compute one with match(source, target) first")
        s2t = np.asarray(corr.source_to_target)
        if s2t.shape != (source.n_vertices,):
            raise SurfaceError(f"correspondence has {s2t.shape[0]} source entries for "
                               f"{source.n_vertices} source vertices")
        conf = getattr(corr, "source_confidence", None)
        return source.vertices, target.vertices[s2t], None if conf is None else np.asarray(conf)
    x = np.asarray(source, dtype=np.float64)
    y = np.asarray(target, dtype=np.float64)
    if x.ndim != 2 or x.shape[1] != 3 or x.shape != y.shape:
        raise ValueError(f"paired points must both have shape (n, 3); got {x.shape} and {y.shape}")
    if len(x) < 3:
        raise ValueError(f"need at least 3 point pairs, got {len(x)}")
    if not (np.isfinite(x).all() and np.isfinite(y).all()):
        raise ValueError("paired points contain NaN or infinite values")
    return x, y, None


def _fit(source, target, corr, weights, robust, max_iter, tol, scaling) -> Transform:
    x, y, conf = _paired_points(source, target, corr)
    w0 = np.ones(len(x)) if weights is None else np.asarray(weights, dtype=np.float64)
    if w0.shape != (len(x),):
        raise ValueError(f"weights must have shape ({len(x)},), got {w0.shape}")
    if np.any(w0 < 0) or not np.all(np.isfinite(w0)):
        raise ValueError("weights must be finite and non-negative")
    if conf is not None:
        w0 = w0 * np.clip(conf, 0.0, 1.0)
    if not w0.sum() > 0:
        w0 = np.ones(len(x))  # no usable confidence: fall back to uniform weights
    pose = Transform(*kabsch(x, y, w0, scaling=scaling))
    w = w0
    it = 0
    if robust:
        # Iteratively reweighted least squares with Tukey's biweight: pairs whose
        # residual is far beyond the robust scale (e.g. a growing region) get weight 0.
        extent = float(np.ptp(x, axis=0).max()) or 1.0
        for it in range(1, max_iter + 1):
            r = np.linalg.norm(y - pose.apply(x), axis=1)
            sigma = MAD_TO_SD * float(np.median(r[w0 > 0]))
            sigma = max(sigma, 1e-9 * extent)
            u = r / (TUKEY_C * sigma)
            w = w0 * np.where(u < 1.0, (1.0 - u * u) ** 2, 0.0)
            if w.sum() <= 0:
                w = w0
                break
            new = Transform(*kabsch(x, y, w, scaling=scaling))
            change = (np.abs(new.rotation - pose.rotation).max()
                      + np.abs(new.translation - pose.translation).max() / extent + abs(new.scale - pose.scale))
            pose = new
            if change < tol:
                break
    r2 = np.sum((y - pose.apply(x)) ** 2, axis=1)
    rms = float(np.sqrt(w @ r2 / w.sum()))
    wmax = w.max()
    return Transform(pose.rotation, pose.translation, float(pose.scale), w / wmax if wmax > 0 else w, rms, it)


def rigid_transform(source, target, corr=None, *, weights: np.ndarray | None = None,
                    robust: bool = True, max_iter: int = 30, tol: float = 1e-10) -> Transform:
    """Rigid transform (rotation + translation) taking `source` onto `target`.

    Weighted Kabsch alignment (Kabsch, Acta Cryst. A 1976) made robust to
    outlying pairs by iteratively reweighted least squares with Tukey's biweight
    (Beaton & Tukey 1974; robust scale 1.4826·MAD of the residuals).

    Parameters
    ----------
    source, target : (n, 3) paired point arrays (mm), or two `Surface` objects
        paired by `corr` (``corr.source_to_target``, required with surfaces;
        ValueError without it).  ``corr.source_confidence`` (when present)
        multiplies the weights.
    weights : (n,) non-negative per-pair weights (e.g. confidence), optional
    robust : downweight outlying pairs (default) or plain weighted least squares
    max_iter, tol : reweighting iterations and convergence tolerance

    Returns
    -------
    Transform with ``.matrix`` (4, 4) such that ``target ≈ transform.apply(source)``.

    Examples
    --------
    >>> import numpy as np, surfacekit as sk
    >>> x = np.random.default_rng(0).normal(size=(50, 3))
    >>> R = sk.synthetic.random_rotation(1)
    >>> T = sk.rigid_transform(x, x @ R.T + [1, 2, 3])
    >>> bool(np.allclose(T.rotation, R))
    True
    """
    return _fit(source, target, corr, weights, robust, max_iter, tol, scaling=False)


def similarity_transform(source, target, corr=None, *, weights: np.ndarray | None = None,
                         robust: bool = True, max_iter: int = 30, tol: float = 1e-10) -> Transform:
    """Similarity transform (rotation, translation, isotropic scale) taking `source` onto `target`.

    Weighted least squares of Umeyama (IEEE TPAMI 1991), robust by Tukey-biweight
    reweighting as in :func:`rigid_transform`; arguments are the same.
    """
    return _fit(source, target, corr, weights, robust, max_iter, tol, scaling=True)
