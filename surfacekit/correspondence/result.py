"""The `Correspondence` result: dense vertex maps between two surfaces, transfer, landmarks, NPZ I/O."""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..io.files import save_fields
from ..io.tables import json_default
from ..mesh.surface import Surface
from .alignment import Transform
from .labels import vote_labels
from .landmark_files import load_landmarks, save_landmarks  # noqa: F401  (their home before)
from .options import MatchOptions

_FORMAT_TAG = "surfacekit.correspondence/1"


def _check_map(name: str, a: np.ndarray) -> np.ndarray:
    a = np.asarray(a)
    if a.ndim != 1 or not np.issubdtype(a.dtype, np.integer):
        raise ValueError(f"{name} must be a 1-D integer array, got shape {a.shape} dtype {a.dtype}")
    if a.size and a.min() < 0:
        raise ValueError(f"{name} has negative vertex indices")
    return a.astype(np.int64, copy=False)


def _check_confidence(name: str, c, n: int) -> np.ndarray | None:
    if c is None:
        return None
    c = np.asarray(c, dtype=np.float64)
    if c.shape != (n,):
        raise ValueError(f"{name} must have shape ({n},), got {c.shape}")
    return np.clip(c, 0.0, 1.0)


def _check_transform(name: str, t) -> Transform | None:
    if t is not None and not isinstance(t, Transform):
        raise ValueError(f"{name} must be a Transform or None, got {type(t).__name__}")
    return t


def _check_array(name: str, a, shape: tuple) -> np.ndarray | None:
    if a is None:
        return None
    a = np.asarray(a, dtype=np.float64)
    if a.shape != shape:
        raise ValueError(f"{name} must have shape {shape}, got {a.shape}")
    return a


def _check_overlap(name: str, mask, n: int) -> np.ndarray:
    if mask is None:
        return np.ones(n, dtype=bool)
    m = np.asarray(mask)
    if m.shape != (n,):
        raise ValueError(f"{name} must have shape ({n},), got {m.shape}")
    return m.astype(bool)


def _transform_arrays(name: str, t: Transform | None) -> dict:
    """NPZ entries of a Transform, each under ``<name>_<field>``."""
    if t is None:
        return {}
    out = {f"{name}_rotation": t.rotation, f"{name}_translation": t.translation,
           f"{name}_scale": np.float64(t.scale), f"{name}_rms": np.float64(t.rms),
           f"{name}_n_iter": np.int64(t.n_iter)}
    if t.weights is not None:
        out[f"{name}_weights"] = t.weights
    return out


def _transform_from(name: str, d: dict) -> Transform | None:
    if f"{name}_rotation" not in d:
        return None  # written before transforms were kept
    return Transform(d[f"{name}_rotation"], d[f"{name}_translation"], float(d[f"{name}_scale"]),
                     d.get(f"{name}_weights"), float(d[f"{name}_rms"]), int(d[f"{name}_n_iter"]))


@dataclass
class Correspondence:
    """Dense correspondence between a source and a target surface.

    Attributes
    ----------
    source_to_target : (n_source,) int64
        Target vertex matching each source vertex.
    target_to_source : (n_target,) int64
        Source vertex matching each target vertex.
    functional_map : (k_target, k_source) float or None
        Matrix C taking Laplace–Beltrami coefficients of a function on the source
        to coefficients on the target (Ovsjanikov et al., SIGGRAPH 2012).
    confidence : (n_target,) in [0, 1] or None
        Per target vertex; 1 = the match is consistent both ways.
    source_confidence : (n_source,) in [0, 1] or None
        Per source vertex.
    similarity : Transform or None
        The solver's chosen pose, source -> target in mm: rotation, translation
        and the scale between the two shapes' sizes (not 1 even without
        ``MatchOptions.scaling``, since the solver works on shapes normalised to
        unit size).
    affine : (4, 4) or None
        That pose followed by the solver's affine fit, source -> target in mm
        (homogeneous matrix acting on column vectors).
    deformation : (n_source, 3) mm or None
        Smooth non-rigid displacement per source vertex: ``affine`` applied to
        source vertex i, plus ``deformation[i]``, is where the solver's smooth
        deformation (low Laplace–Beltrami eigenfunctions) puts it on the target.
    rigid : Transform or None
        The rigid pose (scale 1) of the final map, source -> target in mm, robust
        to a changing region (confidence-weighted, Tukey-reweighted Kabsch fit refined
        by robust point-to-plane ICP; see :func:`surfacekit.correspondence.pose.rigid_pose`).
        ``rigid.weights`` are the final robust weights per source vertex, ``rigid.rms``
        the residual (mm).  ``rigid.inverse()`` brings the target into the source frame.
    options : MatchOptions or None
        The options `match` ran with.
    seed : int or None
        The seed `match` ran with.
    info : dict
        JSON-able diagnostics (route chosen, energies, timings; ``info["partial"]`` when
        one surface was mapped as a part of the other).
    source_overlap : (n_source,) bool
        Source vertices in the region both surfaces cover: all True unless the target
        is a part of the source (a cropped follow-up), where the vertices beyond the
        crop are False.  Their ``source_to_target`` entries point to the nearest
        target vertex but match nothing.
    target_overlap : (n_target,) bool
        The same over the target's vertices (False beyond a cropped source).
    low_confidence : bool
        True when the two surfaces differ more than deformed copies of the same organ do
        (a kidney matched against a liver, say): the map may mean little.  Set by ``sk.match``
        from measured quantities (``info["match_check"]``, see
        :func:`surfacekit.correspondence.mismatch.match_check`), which also issues a
        :class:`~surfacekit.correspondence.mismatch.NoMatchWarning`; False in files
        saved before it was kept.

    The transforms, options and seed are None for correspondences not made by
    ``sk.match`` (and in files saved before they were kept).

    Examples
    --------
    >>> import numpy as np, surfacekit as sk
    >>> corr = sk.Correspondence(np.array([1, 0]), np.array([1, 0]))
    >>> corr.transfer(np.array([10.0, 20.0])).tolist()
    [20.0, 10.0]
    """

    source_to_target: np.ndarray
    target_to_source: np.ndarray
    functional_map: np.ndarray | None = None
    confidence: np.ndarray | None = None
    source_confidence: np.ndarray | None = None
    similarity: Transform | None = None
    affine: np.ndarray | None = None
    deformation: np.ndarray | None = None
    rigid: Transform | None = None
    options: MatchOptions | None = None
    seed: int | None = None
    info: dict = field(default_factory=dict)
    source_overlap: np.ndarray | None = None
    target_overlap: np.ndarray | None = None
    low_confidence: bool = False

    def __post_init__(self):
        self.source_to_target = _check_map("source_to_target", self.source_to_target)
        self.target_to_source = _check_map("target_to_source", self.target_to_source)
        n_s, n_t = self.n_source, self.n_target
        if self.source_to_target.size and self.source_to_target.max() >= n_t:
            raise ValueError("source_to_target points past the last target vertex")
        if self.target_to_source.size and self.target_to_source.max() >= n_s:
            raise ValueError("target_to_source points past the last source vertex")
        if self.functional_map is not None:
            self.functional_map = np.asarray(self.functional_map, dtype=np.float64)
            if self.functional_map.ndim != 2:
                raise ValueError("functional_map must be a 2-D matrix")
        self.confidence = _check_confidence("confidence", self.confidence, n_t)
        self.source_confidence = _check_confidence("source_confidence", self.source_confidence, n_s)
        self.similarity = _check_transform("similarity", self.similarity)
        self.rigid = _check_transform("rigid", self.rigid)
        self.affine = _check_array("affine", self.affine, (4, 4))
        self.deformation = _check_array("deformation", self.deformation, (n_s, 3))
        if isinstance(self.options, dict):
            self.options = MatchOptions.from_dict(self.options)
        if self.options is not None and not isinstance(self.options, MatchOptions):
            raise ValueError(f"options must be a MatchOptions or None, got {type(self.options).__name__}")
        self.seed = None if self.seed is None else int(self.seed)
        self.info = dict(self.info or {})
        self.source_overlap = _check_overlap("source_overlap", self.source_overlap, n_s)
        self.target_overlap = _check_overlap("target_overlap", self.target_overlap, n_t)
        self.low_confidence = bool(self.low_confidence)

    @property
    def is_partial(self) -> bool:
        """True when one surface covers only part of the other (an overlap mask is not all True)."""
        return not (self.source_overlap.all() and self.target_overlap.all())

    @property
    def n_source(self) -> int:
        """Number of source vertices (the length of `source_to_target`)."""
        return len(self.source_to_target)

    @property
    def n_target(self) -> int:
        """Number of target vertices (the length of `target_to_source`)."""
        return len(self.target_to_source)

    # ------------------------------------------------------------ transfer
    def _carry(self, values, n_in: int, pull: np.ndarray, push: np.ndarray, labels, what: str):
        v = np.asarray(values)
        if v.ndim not in (1, 2) or v.shape[0] != n_in:
            raise ValueError(f"{what} must have shape ({n_in},) or ({n_in}, c), got {v.shape}")
        is_labels = (np.issubdtype(v.dtype, np.integer) or v.dtype == bool) if labels is None else labels
        if not is_labels:
            return v[pull]
        if v.ndim != 1:
            raise ValueError(f"labels must be 1-D, got shape {v.shape}")
        return vote_labels(v, pull, np.arange(n_in), push, len(pull))

    def transfer(self, values_on_source, *, labels: bool | None = None) -> np.ndarray:
        """Carry per-vertex values from the source to the target.

        Scalar (n_source,) and vector (n_source, c) fields are pulled back through
        `target_to_source`.  Integer or boolean arrays (or ``labels=True``) are
        treated as labels and decided by a vote of both map directions, so a label
        region keeps its extent where the map is locally many-to-one.
        Returns (n_target,) or (n_target, c).
        """
        return self._carry(values_on_source, self.n_source, self.target_to_source,
                           self.source_to_target, labels, "values_on_source")

    def transfer_back(self, values_on_target, *, labels: bool | None = None) -> np.ndarray:
        """Carry per-vertex values from the target to the source (see :meth:`transfer`)."""
        return self._carry(values_on_target, self.n_target, self.source_to_target,
                           self.target_to_source, labels, "values_on_target")

    # ------------------------------------------------------------- save/load
    def save(self, path) -> Path:
        """Write to an NPZ file (atomically); readable with ``allow_pickle=False``."""
        path = Path(path)
        arrays = {
            "format": np.array(_FORMAT_TAG),
            "source_to_target": self.source_to_target,
            "target_to_source": self.target_to_source,
            "info_json": np.array(json.dumps(self.info, default=json_default)),
        }
        for name in ("functional_map", "confidence", "source_confidence", "affine", "deformation"):
            if getattr(self, name) is not None:
                arrays[name] = getattr(self, name)
        arrays.update(_transform_arrays("similarity", self.similarity))
        arrays.update(_transform_arrays("rigid", self.rigid))
        if self.options is not None:
            arrays["options_json"] = np.array(json.dumps(self.options.to_dict()))
        if self.seed is not None:
            arrays["seed"] = np.int64(self.seed)
        if self.low_confidence:  # files of confident maps stay as they were
            arrays["low_confidence"] = np.bool_(True)
        if self.is_partial:  # whole-to-whole files stay as they were
            arrays["source_overlap"] = self.source_overlap
            arrays["target_overlap"] = self.target_overlap
        return save_fields(path, **arrays)

    @classmethod
    def load(cls, path) -> Correspondence:
        """Read a file written by :meth:`save` (never unpickles)."""
        try:
            with np.load(path, allow_pickle=False) as data:
                d = {k: data[k] for k in data.files}
        except (OSError, ValueError) as exc:
            raise ValueError(f"cannot read correspondence file {path}: {exc}") from None
        if str(d.get("format", "")) != _FORMAT_TAG:
            raise ValueError(f"{path} is not a surfacekit correspondence file")
        return cls(
            source_to_target=d["source_to_target"],
            target_to_source=d["target_to_source"],
            functional_map=d.get("functional_map"),
            confidence=d.get("confidence"),
            source_confidence=d.get("source_confidence"),
            similarity=_transform_from("similarity", d),
            affine=d.get("affine"),
            deformation=d.get("deformation"),
            rigid=_transform_from("rigid", d),
            options=json.loads(str(d["options_json"])) if "options_json" in d else None,
            seed=int(d["seed"]) if "seed" in d else None,
            info=json.loads(str(d["info_json"])),
            source_overlap=d.get("source_overlap"),
            target_overlap=d.get("target_overlap"),
            low_confidence=bool(d.get("low_confidence", False)),
        )

    # ------------------------------------------------------------ landmarks
    def landmarks(self, source: Surface, target: Surface, n: int = 20, seed: int = 0) -> dict:
        """N well-spread landmark pairs for registration pipelines.

        Source vertices are chosen by farthest-point sampling (Euclidean, from a
        seeded start vertex) among the more confident half of the source vertices,
        and paired with their matches on the target.

        Returns
        -------
        dict with ``source_index`` (n,), ``target_index`` (n,), ``source_xyz`` (n, 3)
        mm, ``target_xyz`` (n, 3) mm and ``confidence`` (n,) in [0, 1].
        """
        if source.n_vertices != self.n_source or target.n_vertices != self.n_target:
            raise ValueError(
                f"surfaces have {source.n_vertices}/{target.n_vertices} vertices, the "
                f"correspondence expects {self.n_source}/{self.n_target}")
        n = int(n)
        if not 1 <= n <= self.n_source:
            raise ValueError(f"n must be between 1 and {self.n_source}, got {n}")
        conf = self.source_confidence
        pool = np.arange(self.n_source)
        if conf is not None:
            good = pool[conf >= np.median(conf)]
            pool = good if len(good) >= n else pool
        from ..mesh.sampling import farthest_points

        idx = pool[farthest_points(source.vertices[pool], n, seed=seed)]
        t_idx = self.source_to_target[idx]
        return {
            "source_index": idx.astype(np.int64),
            "target_index": t_idx.astype(np.int64),
            "source_xyz": np.asarray(source.vertices[idx], dtype=np.float64),
            "target_xyz": np.asarray(target.vertices[t_idx], dtype=np.float64),
            "confidence": (conf[idx] if conf is not None else np.ones(n)),
        }
