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
from .mesh_quality import QualityReport, enclosed_centroid, quality_report
from .remesh import improve_triangles, resample
from .repair import umbrella_matrix
from .routes import prepare_pieces, repair_chain, select_parts

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
    route: str = "repaired in place"
    route_reason: str | None = None
    voxel_mm: float | None = None
    part_index: int = 0
    n_parts: int = 1

    def to_dict(self) -> dict:
        d = asdict(self)
        d["before"], d["after"] = self.before.to_dict(), self.after.to_dict()
        return d

    def to_json(self, **kwargs) -> str:
        return json.dumps(self.to_dict(), **kwargs)

    def format(self) -> str:
        lines = [f"route: {self.route}" + (f" ({self.route_reason})" if self.route_reason else "")]
        lines += ["actions:"] + [f"  - {a}" for a in self.actions or ["none"]]
        lines += ["before:", *("  " + x for x in self.before.format().splitlines())]
        lines += ["after:", *("  " + x for x in self.after.format().splitlines())]
        return "\n".join(lines)

    __str__ = format


def prepare(surface: Surface, *, target_vertices: int | None = None, smooth: bool | None = None,
            smoothing_iterations: int = 30, max_hole_edges: int = 200, keep_largest: bool = True,
            fairing_scale_mm: float | None = None, preserve_volume: bool = True,
            merge_tolerance: float | None = None, keep: str | int = "largest",
            volumetric: bool | None = None, voxel_mm: float | None = None):
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

    When the surface cannot be repaired in place (it is not orientable, or closed
    pieces of it cross each other), it is rebuilt through a volume instead
    (:mod:`surfacekit.preparation.volumetric`): every cell of a grid of spacing
    ``voxel_mm`` is classified inside/outside (winding number along grid lines for
    closed orientable pieces, so overlapping pieces give their union; a 6-ray
    parity vote for the rest), the inside cells are meshed by marching cubes as a
    label volume is, then smoothed (on by default) and held to the inside volume
    (inside-cell count x cell volume).  ``report.route`` and ``report.route_reason``
    say which route was taken and why; the first action names the grid spacing.

    Parameters
    ----------
    surface : Surface (or anything with ``vertices`` and ``faces``, e.g. a trimesh)
    target_vertices : vertex count of the output (within 3%); None keeps the resolution
    smooth : True/False forces smoothing on/off; None (default) smooths surfaces whose
        metadata says they come from a segmentation (staircase artefacts) and surfaces
        rebuilt through a volume
    smoothing_iterations : number of λ|μ pairs
    fairing_scale_mm : smoothing length of the implicit fairing (mm); default the largest
        voxel spacing in ``surface.metadata["spacing"]`` (or the grid spacing of a rebuilt
        surface), else the mean edge length; 0 skips it
    max_hole_edges : boundary loops up to this many edges are filled
    keep_largest : with ``keep="largest"``, False keeps every component in one surface
    preserve_volume : restore the enclosed volume after smoothing/resampling
    merge_tolerance : distance (mm) under which vertices are merged; default 1e-7
        of the bounding-box diagonal
    keep : which part to return when the surface holds several: ``"largest"`` (by
        area; by inside volume when rebuilt), ``"all"`` (each part prepared on its own,
        a list is returned), an int index into the parts ordered largest first, or
        ``"volume:<ml>"``: the closed part whose enclosed volume is nearest that many
        millilitres (1 ml = 1000 mm³).
        Parts are pieces joined through edges (pieces touching at a vertex are separate).
    volumetric : None (default) rebuilds through a volume only when needed; True always;
        False never (a non-orientable surface then raises as before)
    voxel_mm : grid spacing of the volumetric route (mm); default the mean edge length,
        at most 1/64 of the longest side, coarsened to stay below 8 million cells

    Returns
    -------
    (Surface, PrepareReport), or for ``keep="all"`` a list of them, largest first.
        The output is one watertight, consistently oriented, outward manifold when
        the input encloses a volume; otherwise ``report.after.warnings`` says what
        is left (for example a hole longer than ``max_hole_edges``).

    Raises
    ------
    SurfaceError
        When nothing valid is left, the surface encloses no grid cell, or (with
        ``volumetric=False``) the surface is not orientable.
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
    volume_ml = _volume_wanted(keep)
    if keep not in ("largest", "all") and volume_ml is None and (
            isinstance(keep, (bool, str, float)) or not float(keep).is_integer()):
        raise ValueError(f"keep must be 'largest', 'all', 'volume:<ml>' or a part index, "
                         f"got {keep!r}")
    if voxel_mm is not None and not (np.isfinite(voxel_mm) and voxel_mm > 0):
        raise ValueError(f"voxel_mm must be a positive number of mm, got {voxel_mm!r}")
    params = {"target_vertices": target_vertices, "smooth": smooth,
              "smoothing_iterations": smoothing_iterations, "max_hole_edges": max_hole_edges,
              "keep_largest": keep_largest, "preserve_volume": preserve_volume, "keep": keep,
              "volumetric": volumetric, "voxel_mm": voxel_mm}
    before = quality_report(surface)
    opts = {"keep_largest": keep_largest, "max_hole_edges": max_hole_edges,
            "merge_tolerance": merge_tolerance}
    pieces, route = prepare_pieces(surface, keep, keep_largest, volumetric, voxel_mm, opts)
    if volume_ml is not None:
        keep = _nearest_volume(pieces, volume_ml)
    chosen = select_parts(pieces, keep if keep in ("largest", "all") else int(keep))
    out = []
    for k, (v, f, actions, reference, spacing) in enumerate(chosen):
        metadata = dict(surface.metadata)
        if spacing is not None:
            metadata.update(spacing=spacing, voxel_mm=route["voxel_mm"])
        index = k if keep in ("largest", "all") else int(keep) % len(pieces)
        report = PrepareReport(before=before, after=before, actions=actions,
                               reference_volume_mm3=reference, parameters=dict(params),
                               route=route["route"], route_reason=route["reason"],
                               voxel_mm=route["voxel_mm"], part_index=index,
                               n_parts=route["n_parts"])
        do_smooth = (spacing is not None) if smooth is None else smooth
        if smooth is None and spacing is None:
            do_smooth = bool(metadata.get("from_segmentation", False))
        s = Surface(v, f, metadata=metadata)
        out.append(_finish(s, report, do_smooth, smoothing_iterations, fairing_scale_mm,
                           target_vertices, preserve_volume, opts))
    return out if keep == "all" else out[0]


def _volume_wanted(keep) -> float | None:
    """The millilitres of ``keep="volume:<ml>"``, None for any other ``keep``."""
    if not (isinstance(keep, str) and keep.startswith("volume:")):
        return None
    try:
        ml = float(keep[len("volume:"):])
    except ValueError:
        ml = float("nan")
    if not (np.isfinite(ml) and ml > 0):
        raise ValueError(f"keep='volume:<ml>' needs a positive number of millilitres, got {keep!r}")
    return ml


def _nearest_volume(pieces: list, ml: float) -> int:
    """Index of the closed piece whose enclosed volume is nearest ``ml`` millilitres."""
    volumes = [p[3] for p in pieces]
    if not any(volumes):
        raise SurfaceError("keep='volume:...' needs closed parts, but no part encloses a volume")
    gaps = [abs(v / 1000.0 - ml) if v else np.inf for v in volumes]
    return int(np.argmin(gaps))


def _finish(s: Surface, report: PrepareReport, smooth: bool, smoothing_iterations: int,
            fairing_scale_mm: float | None, target_vertices: int | None,
            preserve_volume: bool, opts: dict) -> tuple[Surface, PrepareReport]:
    """Smoothing, resampling and the volume correction of one repaired piece."""
    metadata, actions, params = s.metadata, report.actions, report.parameters
    reference = report.reference_volume_mm3
    params["smooth"] = smooth

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
        v, f, more = repair_chain(np.array(s.vertices), np.array(s.faces), **opts)
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
