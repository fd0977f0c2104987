"""Per-surface state of the correspondence solver: normalised points, spectra, samples, landmarks."""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from ..mesh.eigen import eigenbasis
from ..mesh.sampling import farthest_points
from ..mesh.surface import Surface, SurfaceError
from . import extrinsic as ex
from .fmap import SpectralShape, spectral_descriptors
from .options import MatchOptions


@dataclass
class ShapeState(SpectralShape):
    """Everything the solver needs from one surface: its unit-area spectrum (the
    :class:`SpectralShape` fields `surface`, `phi`, `values`, `mass`, `area`) and its
    unit-size coordinates, samples, descriptors and landmarks.  One per surface."""

    points: np.ndarray      # (n, 3) centred coordinates, unit size (see ex.normalized_coordinates)
    centroid: np.ndarray    # (3,) mm, subtracted from the vertices before scaling
    scale: float            # 1/mm: points = (vertices - centroid) * scale
    samples: np.ndarray     # (p,) well-spread vertex indices
    weights: np.ndarray     # (n,) vertex areas / total area (extrinsic weights of the pose fits)
    tree: cKDTree           # over all normalised points
    desc: np.ndarray        # (n, d) unit-norm spectral descriptors
    landmarks: np.ndarray   # (l, 2) known (source, target) vertex pairs
    lm_vertices: np.ndarray  # (l,) this shape's landmark vertices, in pair order
    lm_rows: np.ndarray     # (l,) their positions in `samples`

    @property
    def sp(self) -> np.ndarray:
        """Normalised points at the samples, (p, 3)."""
        return self.points[self.samples]

    @property
    def sphi(self) -> np.ndarray:
        """Unit-area eigenvectors at the samples, (p, k)."""
        return self.phi[self.samples]

    @property
    def sdesc(self) -> np.ndarray:
        """Descriptors at the samples, (p, d)."""
        return self.desc[self.samples]

    def plane_distances(self, points: np.ndarray) -> np.ndarray:
        """Distance of each point (normalised units) to the tangent plane at its closest vertex, (p,)."""
        return ex.plane_distances(points, self.tree, self.points, self.surface.vertex_normals)

    def to_mm(self, points: np.ndarray) -> np.ndarray:
        """Normalised coordinates of this shape's frame back to mm, (p, 3)."""
        return points / self.scale + self.centroid


def prepare_shape(s: Surface, opts: MatchOptions, seed: int, side: int) -> ShapeState:
    """The solver's state of one surface; `side` 0 for the source, 1 for the target (which
    column of the landmark pairs is this surface's)."""
    basis = eigenbasis(s, opts.n_eigen)
    pts, centroid, scale = ex.normalized_coordinates(s)
    lm = landmark_pairs(opts)
    samples = farthest_points(pts, min(opts.n_samples, s.n_vertices), seed=seed)
    samples = np.unique(np.concatenate([samples, lm[:, side]]))  # landmarks are always sampled
    spectral = SpectralShape.from_basis(s, basis)
    return ShapeState(s, spectral.phi, spectral.values, spectral.mass, spectral.area,
                      pts, centroid, scale, samples, s.vertex_areas / s.area, cKDTree(pts),
                      spectral_descriptors(spectral, basis), lm, lm[:, side],
                      np.searchsorted(samples, lm[:, side]))


def landmark_anchors(src: ShapeState, tgt: ShapeState, opts: MatchOptions):
    """Landmark pairs as anchors for the extrinsic fits (see :func:`~.extrinsic.anchor_rows`):
    source sample rows, target points and weight; None without landmarks."""
    if not len(src.landmarks):
        return None
    return src.lm_rows, tgt.points[tgt.lm_vertices], opts.landmark_weight


def checked_options(source, target, options) -> MatchOptions:
    """The options to match `source` with `target` (defaults when None), after checking both
    surfaces and the options against each other; raises SurfaceError or ValueError."""
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
    lm = landmark_pairs(opts)
    if len(lm) and (lm[:, 0].max() >= source.n_vertices or lm[:, 1].max() >= target.n_vertices):
        raise ValueError("landmarks refer to vertices beyond the source or target")
    return opts


def landmark_pairs(opts: MatchOptions) -> np.ndarray:
    """The landmark pairs of `opts` as an (l, 2) int64 array."""
    return np.asarray(opts.landmarks, dtype=np.int64).reshape(-1, 2)
