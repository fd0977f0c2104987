"""Per-surface state of the correspondence solver: normalised points, spectra, samples, landmarks."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from ..mesh.operators import eigenbasis
from ..mesh.surface import Surface, SurfaceError
from . import extrinsic as ex
from .fmap import SpectralShape, spectral_descriptors
from .options import MatchOptions
from .sampling import farthest_points


@dataclass
class _Shape:
    """Everything the solver needs from one surface, normalised in size."""

    surface: Surface
    points: np.ndarray      # (n, 3) centred coordinates, unit size (see ex.normalized_coordinates)
    phi: np.ndarray         # (n, k) eigenvectors scaled to unit area
    values: np.ndarray      # (k,) eigenvalues scaled to unit area
    samples: np.ndarray     # (p,) well-spread vertex indices
    weights: np.ndarray     # (n,) vertex areas / total area
    tree: cKDTree           # over all normalised points
    spectral: SpectralShape
    desc: np.ndarray        # (n, d) unit-norm spectral descriptors
    landmarks: np.ndarray   # (l, 2) known (source, target) vertex pairs
    lm_vertices: np.ndarray  # (l,) this shape's landmark vertices, in pair order
    lm_rows: np.ndarray     # (l,) their positions in `samples`

    @property
    def sp(self) -> np.ndarray:
        return self.points[self.samples]

    @property
    def sphi(self) -> np.ndarray:
        return self.phi[self.samples]

    @property
    def sdesc(self) -> np.ndarray:
        return self.desc[self.samples]

    def plane_distances(self, points: np.ndarray) -> np.ndarray:
        """Distance of each point (normalised units) to the tangent plane at its closest vertex, (p,)."""
        return ex.plane_distances(points, self.tree, self.points, self.surface.vertex_normals)


def _prepare(s: Surface, opts: MatchOptions, seed: int, side: int) -> _Shape:
    """`side` 0 for the source, 1 for the target (which column of the landmark pairs is ours)."""
    basis = eigenbasis(s, opts.n_eigen)
    pts, _, _scale = ex.normalized_coordinates(s)
    lm = _landmark_array(opts)
    samples = farthest_points(pts, min(opts.n_samples, s.n_vertices), seed=seed)
    samples = np.unique(np.concatenate([samples, lm[:, side]]))  # landmarks are always sampled
    spectral = SpectralShape.from_basis(s, basis)
    return _Shape(s, pts, spectral.phi, spectral.values, samples, s.vertex_areas / s.area,
                  cKDTree(pts), spectral, spectral_descriptors(spectral, basis),
                  lm, lm[:, side], np.searchsorted(samples, lm[:, side]))


def _anchors(src: _Shape, tgt: _Shape, opts: MatchOptions):
    """Landmark pairs as anchors for the extrinsic fits: source sample rows and target points."""
    if not len(src.landmarks):
        return None
    return src.lm_rows, tgt.points[tgt.lm_vertices], opts.landmark_weight


def _check_inputs(source, target, options) -> MatchOptions:
    for name, s in (("source", source), ("target", target)):
        if not isinstance(s, Surface):
            raise SurfaceError(f"{name} must be a surfacekit Surface, got {type(s).__name__}")
        if s.n_vertices < 20:
            raise SurfaceError(f"{name} has {s.n_vertices} vertices; at least 20 are needed")
        if s.n_unreferenced_vertices:
            raise SurfaceError(f"{name} has {s.n_unreferenced_vertices} vertices used by no face")
        if s.n_components != 1:
            raise SurfaceError(f"{name} has {s.n_components} connected components; match one at a time")
        if not s.area > 0:
            raise SurfaceError(f"{name} has zero area")
    opts = options if options is not None else MatchOptions()
    if not isinstance(opts, MatchOptions):
        raise ValueError(f"options must be a MatchOptions, got {type(opts).__name__}")  # noqa: TRY004
    opts.validate()
    lm = _landmark_array(opts)
    if len(lm) and (lm[:, 0].max() >= source.n_vertices or lm[:, 1].max() >= target.n_vertices):
        raise ValueError("landmarks refer to vertices beyond the source or target")
    return opts


def _landmark_array(opts: MatchOptions) -> np.ndarray:
    lm = np.asarray(opts.landmarks, dtype=np.int64).reshape(-1, 2)
    if len(lm) and lm.min() < 0:
        raise ValueError("landmarks must be non-negative vertex indices")
    return lm
