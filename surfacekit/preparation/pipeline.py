"""Make any input mesh an analysis-ready surface: repair, smooth, resample, report.

`prepare` chains the repair steps of `surfacekit.preparation.repair`,
volume-preserving Taubin smoothing and resampling to a target vertex count, and
returns the new surface with a `PrepareReport` (quality before and after, the
actions taken in plain words).  `quality_report` / `QualityReport` live in
`surfacekit.preparation.mesh_quality` and are re-exported here.
"""
from __future__ import annotations

import json
import logging
from dataclasses import asdict, dataclass, field

import numpy as np
import scipy.sparse as sp
from scipy.sparse.linalg import cg

from ..mesh.laplacian import cotangent_laplacian
from ..mesh.surface import Surface, SurfaceError
from . import repair
from .mesh_quality import QualityReport, enclosed_centroid, quality_report
from .remesh import improve_triangles, resample
from .repair import umbrella_matrix

__all__ = [
    "PrepareReport",
    "QualityReport",
    "prepare",
    "quality_report",
    "resample",
    "restore_volume",
    "taubin_smooth",
]

log = logging.getLogger("surfacekit")


# ---------------------------------------------------------------- smoothing
def taubin_smooth(vertices: np.ndarray, faces: np.ndarray, iterations: int = 30, *,
                  lam: float = 0.5, mu: float = -0.53, fixed: np.ndarray | None = None) -> np.ndarray:
    """Taubin λ|μ smoothing (Taubin, "A signal processing approach to fair surface design", SIGGRAPH 1995).

    Each iteration applies ``x <- x + λ Δx`` then ``x <- x + μ Δx`` with the
    umbrella (uniform-weight) Laplacian ``Δx_i = mean_j(x_j) - x_i``.  With
    ``0 < λ < -μ`` the transfer function ``(1 - λk)(1 - μk)`` passes frequencies
    below ``k_PB = 1/λ + 1/μ`` (≈ 0.11 here) and damps higher ones, so voxel
    staircases (the highest frequencies of a marching-cubes mesh) vanish while
    the organ's shape is kept; shrinkage is small but not zero (measured in the
    tests and restored by :func:`restore_volume`).  Uniform weights also even out
    the vertex distribution along the surface.

    Parameters
    ----------
    vertices : (n, 3) mm
    faces : (m, 3) int
    iterations : number of λ|μ pairs
    lam, mu : the two step factors (Taubin's suggested λ=0.5, k_PB≈0.1)
    fixed : optional (n,) bool, vertices that do not move (e.g. an open boundary)

    Returns
    -------
    (n, 3) smoothed vertices, mm
    """
    if not (0 < lam < -mu):
        raise ValueError(f"Taubin smoothing needs 0 < lam < -mu, got lam={lam}, mu={mu}")
    x = np.array(vertices, dtype=np.float64)
    W = umbrella_matrix(np.asarray(faces), len(x))
    move = None if fixed is None else ~np.asarray(fixed, bool)[:, None]
    for _ in range(int(iterations)):
        for factor in (lam, mu):
            step = factor * (W @ x - x)
            x += step if move is None else step * move
    return x


def implicit_fairing(vertices: np.ndarray, faces: np.ndarray, scale_mm: float,
                     steps: int = 1) -> np.ndarray:
    """Implicit mean-curvature fairing (Desbrun, Meyer, Schröder & Barr, SIGGRAPH 1999).

    Backward-Euler steps of the mean-curvature flow ``∂x/∂t = Δx = -2 H n`` with
    the cotangent Laplacian (Pinkall & Polthier 1993): ``(M + τ L) x' = M x``,
    ``τ = scale_mm² / steps``, solved by Jacobi-preconditioned conjugate gradients (the matrix is
    symmetric positive definite).  Bumps narrower than about ``scale_mm`` are
    flattened whatever the triangle sizes, which is what a staircase of thick
    slices needs; the surface also shrinks by about ``2 τ H`` along its normal
    (about 3·2τ/r of the volume of a sphere of radius r), which
    :func:`restore_volume` undoes.

    Parameters
    ----------
    vertices : (n, 3) mm
    faces : (m, 3) int
    scale_mm : smoothing length (mm); τ = scale² in mm²
    steps : number of implicit steps sharing that total time

    Returns
    -------
    (n, 3) faired vertices, mm
    """
    x = np.array(vertices, dtype=np.float64)
    f = np.asarray(faces)
    tau = float(scale_mm) ** 2 / max(int(steps), 1)
    for _ in range(max(int(steps), 1)):
        mass = Surface(x.copy(), f).vertex_areas
        A = (sp.diags(mass) + tau * cotangent_laplacian(x, f)).tocsr()
        jacobi = sp.diags(1.0 / A.diagonal())
        rhs = mass[:, None] * x
        for c in range(3):
            # warm start from the current positions: a few dozen iterations suffice
            sol, info = cg(A, rhs[:, c], x0=x[:, c], rtol=1e-8, maxiter=2000, M=jacobi)
            if info != 0:
                raise SurfaceError("implicit fairing did not converge (badly shaped triangles)")
            x[:, c] = sol
    return x


def restore_volume(surface: Surface, volume: float) -> tuple[Surface, float]:
    """Scale a closed surface uniformly about its enclosed centroid to a given volume (mm³).

    A uniform scale by ``(V_target / V)^(1/3)`` about the solid's centroid keeps the
    centroid and the shape and restores the enclosed volume exactly.  Returns the
    new surface and the scale factor applied.
    """
    current = surface.signed_volume
    if not surface.is_closed or current <= 0 or volume <= 0:
        return surface, 1.0
    scale = float((volume / current) ** (1.0 / 3.0))
    c = enclosed_centroid(surface)
    return surface.copy_with(vertices=c + scale * (surface.vertices - c)), scale


# ---------------------------------------------------------------- the pipeline
@dataclass
class PrepareReport:
    """What `prepare` found and did.

    ``before``/``after`` are quality reports of the input and the output;
    ``actions`` lists each change in plain words.  ``smoothing_volume_change`` is
    the relative change of enclosed volume caused by smoothing alone (before the
    restoring rescale); ``volume_change`` the relative change of the output
    against ``reference_volume_mm3``, the repaired input's enclosed volume.
    """

    before: QualityReport
    after: QualityReport
    actions: list[str] = field(default_factory=list)
    smoothing_volume_change: float | None = None
    volume_change: float | None = None
    volume_scale: float = 1.0
    reference_volume_mm3: float | None = None
    parameters: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        d = asdict(self)
        d["before"], d["after"] = self.before.to_dict(), self.after.to_dict()
        return d

    def to_json(self, **kwargs) -> str:
        return json.dumps(self.to_dict(), **kwargs)

    def format(self) -> str:
        lines = ["actions:"] + [f"  - {a}" for a in self.actions or ["none"]]
        lines += ["before:", *("  " + x for x in self.before.format().splitlines())]
        lines += ["after:", *("  " + x for x in self.after.format().splitlines())]
        return "\n".join(lines)

    __str__ = format


def _vertices_word(n: int) -> str:
    return f"{n} {'vertex' if n == 1 else 'vertices'}"


def _repair(v: np.ndarray, f: np.ndarray, *, keep_largest: bool, max_hole_edges: int,
            merge_tolerance: float | None) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The topological repair chain; returns arrays and the actions in plain words."""
    actions = []
    v, f, n = repair.merge_duplicate_vertices(v, f, merge_tolerance)
    if n:
        actions.append(f"merged {_vertices_word(n)} duplicated at the same position")
    v, f, n = repair.remove_degenerate_faces(v, f)
    if n:
        actions.append(f"removed {n} degenerate faces (zero area or repeated vertex)")
    v, f, n = repair.remove_duplicate_faces(v, f)
    if n:
        actions.append(f"removed {n} duplicated faces")
    v, f, n = repair.remove_non_manifold_edges(v, f)
    if n:
        actions.append(f"removed {n} faces attached along non-manifold edges")
    if len(f) == 0:
        raise SurfaceError("no valid faces left after removing degenerate and non-manifold faces")
    v, f, n = repair.split_non_manifold_vertices(v, f)
    if n:
        actions.append(f"split {n} non-manifold (pinched) {'vertex' if n == 1 else 'vertices'}")
    if keep_largest:
        v, f, nc, nv = repair.keep_largest_component(v, f)
        if nc:
            actions.append(f"removed {nc} small component{'s' if nc > 1 else ''} "
                           f"({_vertices_word(nv)}), kept the largest by area")
    f, n = repair.orient_consistently(f)
    if n:
        actions.append(f"flipped {n} faces to make the orientation consistent")
    v, f, n, left = repair.fill_holes(v, f, max_hole_edges)
    if n:
        actions.append(f"filled {n} hole{'s' if n > 1 else ''} (up to {max_hole_edges} edges; "
                       "patches follow the surrounding curvature)")
    if left:
        actions.append(f"left {left} boundary loop{'s' if left > 1 else ''} open "
                       f"(longer than {max_hole_edges} edges or not simple)")
    v, f, _ = repair.compact(v, f)
    s = Surface(v, f)  # only the signed volume is needed
    if s.signed_volume < 0:
        f = f[:, ::-1].copy()
        actions.append("reversed all faces so that normals point outward")
    return v, f, actions


def prepare(surface: Surface, *, target_vertices: int | None = None, smooth: bool | None = None,
            smoothing_iterations: int = 30, max_hole_edges: int = 200, keep_largest: bool = True,
            fairing_scale_mm: float | None = None, preserve_volume: bool = True,
            merge_tolerance: float | None = None) -> tuple[Surface, PrepareReport]:
    """Repair, smooth and resample a surface into a clean, closed, outward manifold.

    Steps, each recorded in the report when it changes something: merge
    coincident vertices; drop degenerate and duplicated faces; cut faces off
    non-manifold edges and split pinched vertices; keep the largest component;
    orient faces consistently (then outward); fill holes up to
    ``max_hole_edges`` with ring patches placed by a biharmonic fill
    (:func:`surfacekit.preparation.repair.fill_holes`); smoothing: Taubin λ|μ
    (:func:`taubin_smooth`) against the one-voxel staircase, then one implicit
    mean-curvature fairing step (:func:`implicit_fairing`) at the largest voxel
    size, which flattens the wide terraces of thick slices that the Taubin filter
    cannot reach, then edge collapses/flips and tangential relaxation for
    well-shaped triangles; resampling to ``target_vertices``
    (:func:`surfacekit.preparation.remesh.resample`), followed by the repair chain again;
    finally a uniform rescale about the enclosed centroid restores the enclosed
    volume of the repaired, unsmoothed input (:func:`restore_volume`), so
    smoothing and decimation do not bias organ volumes.

    Parameters
    ----------
    surface : Surface (or anything with ``vertices`` and ``faces``, e.g. a trimesh)
    target_vertices : vertex count of the output (within 3%); None keeps the resolution
    smooth : True/False forces smoothing on/off; None (default) smooths surfaces whose
        metadata says they come from a segmentation (staircase artefacts)
    smoothing_iterations : number of λ|μ pairs
    fairing_scale_mm : smoothing length of the implicit fairing (mm); default the largest
        voxel spacing in ``surface.metadata["spacing"]``, else the mean edge length; 0 skips it
    max_hole_edges : boundary loops up to this many edges are filled
    keep_largest : keep only the largest component (others are reported)
    preserve_volume : restore the enclosed volume after smoothing/resampling
    merge_tolerance : distance (mm) under which vertices are merged; default 1e-7
        of the bounding-box diagonal

    Returns
    -------
    (Surface, PrepareReport)
        The output is one watertight, consistently oriented, outward manifold when
        the input encloses a volume; otherwise ``report.after.warnings`` says what
        is left (for example a hole longer than ``max_hole_edges``).

    Raises
    ------
    SurfaceError
        When nothing valid is left or the surface is not orientable.
    """
    if not isinstance(surface, Surface):
        if hasattr(surface, "vertices") and hasattr(surface, "faces"):
            surface = Surface(surface.vertices, surface.faces)
        else:
            raise SurfaceError(f"prepare needs a Surface, got {type(surface).__name__}")
    if target_vertices is not None and (int(target_vertices) != target_vertices
                                        or target_vertices < 4):
        raise ValueError(f"target_vertices must be an integer >= 4, got {target_vertices!r}")
    if smoothing_iterations < 0 or max_hole_edges < 0:
        raise ValueError("smoothing_iterations and max_hole_edges must be >= 0")
    metadata = dict(surface.metadata)
    if smooth is None:
        smooth = bool(metadata.get("from_segmentation", False))
    params = {"target_vertices": target_vertices, "smooth": smooth,
              "smoothing_iterations": smoothing_iterations, "max_hole_edges": max_hole_edges,
              "keep_largest": keep_largest, "preserve_volume": preserve_volume}
    before = quality_report(surface)
    opts = {"keep_largest": keep_largest, "max_hole_edges": max_hole_edges,
            "merge_tolerance": merge_tolerance}
    v, f, actions = _repair(np.array(surface.vertices), np.array(surface.faces), **opts)
    s = Surface(v, f, metadata=metadata)
    reference = s.signed_volume if s.is_closed else None
    report = PrepareReport(before=before, after=before, actions=actions,
                           reference_volume_mm3=reference, parameters=params)

    if smooth:
        fixed = None if s.is_closed else s.connectivity.boundary_vertices
        if fairing_scale_mm is None:
            spacing = metadata.get("spacing")
            fairing_scale_mm = float(max(spacing)) if spacing else s.mean_edge_length
        v0 = s.signed_volume
        x = taubin_smooth(s.vertices, s.faces, smoothing_iterations, fixed=fixed)
        if fairing_scale_mm > 0:
            faired = implicit_fairing(x, s.faces, fairing_scale_mm)
            x = faired if fixed is None else np.where(fixed[:, None], x, faired)
        improve = target_vertices is None and fixed is None  # resampling improves anyway
        if improve:
            x, f_new = improve_triangles(x, s.faces)
            s = s.copy_with(vertices=x, faces=f_new)
        else:
            s = s.copy_with(vertices=x)
        what = (f"Taubin λ|μ, {smoothing_iterations} iterations, then implicit fairing at "
                f"{fairing_scale_mm:.3g} mm")
        if improve:
            what += "; triangles evened out by edge flips and tangential relaxation"
        if reference:
            report.smoothing_volume_change = s.signed_volume / v0 - 1.0
            actions.append(f"smoothed staircase artefacts ({what}; volume change "
                           f"{report.smoothing_volume_change:+.2%} before correction)")
        else:
            actions.append(f"smoothed ({what}; open boundary held fixed)")
        params["fairing_scale_mm"] = fairing_scale_mm

    if target_vertices is not None and int(target_vertices) != s.n_vertices:
        n0 = s.n_vertices
        s = resample(s, int(target_vertices))
        v, f, more = _repair(np.array(s.vertices), np.array(s.faces), **opts)
        s = Surface(v, f, metadata=metadata)
        actions.append(f"resampled from {n0} to {s.n_vertices} vertices "
                       "(quadric decimation, short-edge collapses, edge flips, tangential "
                       "relaxation)")
        actions.extend(f"after resampling: {a}" for a in more)

    if preserve_volume and reference and s.is_closed:
        s, scale = restore_volume(s, reference)
        report.volume_scale = scale
        if abs(scale - 1.0) > 1e-12:
            actions.append(f"rescaled by {scale:.5f} about the enclosed centroid to restore "
                           f"the enclosed volume ({reference:.1f} mm³)")
    if reference and s.is_closed:
        report.volume_change = s.signed_volume / reference - 1.0
    s.metadata.update(prepared=True, smoothed=bool(smooth))
    report.after = quality_report(s)
    for w in report.after.warnings:
        log.warning("prepare: %s", w)
    return s, report
