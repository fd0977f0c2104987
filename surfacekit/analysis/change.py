"""Change between a baseline and a follow-up scan of the same organ.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..correspondence.closest import closest_near
from ..correspondence.result import Correspondence
from ..io.tables import RESEARCH_NOTE, json_default, write_csv
from ..mesh.laplacian import face_to_vertex_mean
from ..mesh.proximity import outward_vertex_normals, ring_faces
from ..mesh.surface import Surface, SurfaceError
from . import geometry as geo
from .components import boundary_band, open_note
from .metrics import REGION_COLUMNS, change_metrics, regional_rows
from .plausibility import change_value_warnings, pair_warnings


@dataclass
class ChangeReport:
    """Per-baseline-vertex change from a baseline to a follow-up surface.

    Attributes
    ----------
    displacement : (n, 3) mm, baseline vertex to its mapped point on the follow-up,
        in the baseline frame, after removing the rigid motion
    normal_displacement : (n,) mm, displacement along the outward baseline normal
        (positive = the follow-up lies outside: local growth or bulging)
    log_area_ratio : (n,) natural log of (mapped area on the follow-up / baseline
        area) around each vertex: > 0 local growth, < 0 local atrophy
    confidence : (n,) in [0, 1], the correspondence confidence of each baseline vertex
    rigid : (4, 4) the removed rigid motion, mapping follow-up coordinates into the
        baseline frame (mm)
    baseline_volume_mm3, followup_volume_mm3, baseline_area_mm2, followup_area_mm2 :
        of the whole surfaces (a volume is NaN when its surface is open)
    labels : (n,) int region labels on the baseline, or None
    region_names : {label: name}
    info : dict of diagnostics (JSON-able)
    """

    displacement: np.ndarray
    normal_displacement: np.ndarray
    log_area_ratio: np.ndarray
    confidence: np.ndarray
    vertex_areas: np.ndarray
    rigid: np.ndarray
    baseline_volume_mm3: float
    followup_volume_mm3: float
    baseline_area_mm2: float
    followup_area_mm2: float
    labels: np.ndarray | None = None
    region_names: dict = field(default_factory=dict)
    info: dict = field(default_factory=dict)

    # ------------------------------------------------------------ global change
    @property
    def volume_change_ml(self) -> float:
        """Follow-up minus baseline enclosed volume (ml = 1000 mm³); NaN for open surfaces."""
        return (self.followup_volume_mm3 - self.baseline_volume_mm3) / 1000.0

    @property
    def volume_change_percent(self) -> float:
        """Relative volume change (%); NaN unless both surfaces are closed."""
        return 100.0 * (self.followup_volume_mm3 / self.baseline_volume_mm3 - 1.0)

    def _compared_areas(self) -> tuple[float, float]:
        """Baseline and follow-up area compared: the whole surfaces, or for open surfaces the
        region both cover (``info["covered_baseline_area_mm2"]``, ...)."""
        if "covered_baseline_area_mm2" in self.info:
            return (float(self.info["covered_baseline_area_mm2"]),
                    float(self.info["covered_followup_area_mm2"]))
        return self.baseline_area_mm2, self.followup_area_mm2

    @property
    def area_change_mm2(self) -> float:
        """Follow-up minus baseline area; for open surfaces over the region both cover."""
        base, follow = self._compared_areas()
        return follow - base

    @property
    def area_change_percent(self) -> float:
        """Relative area change (%); for open surfaces over the region both cover."""
        base, follow = self._compared_areas()
        return 100.0 * (follow / base - 1.0)

    def metrics(self, mask: np.ndarray | None = None) -> dict:
        """Area-weighted change metrics over all vertices or a region (:func:`change_metrics`)."""
        return change_metrics(self, mask)

    def summary(self) -> dict:
        """Global change and the change metrics as a JSON-able dict (with a research-use note).

        The field statistics are those of :meth:`metrics` (area-weighted with the
        baseline vertex areas), under the same names as in the regional table and
        the cohort tables.
        """
        field_stats = {k: v for k, v in self.metrics().items() if k != "area_mm2"}
        return {
            "baseline_volume_ml": self.baseline_volume_mm3 / 1000.0,
            "followup_volume_ml": self.followup_volume_mm3 / 1000.0,
            "volume_change_followup_minus_baseline_ml": self.volume_change_ml,
            "volume_change_followup_minus_baseline_percent": self.volume_change_percent,
            "baseline_area_mm2": self.baseline_area_mm2,
            "followup_area_mm2": self.followup_area_mm2,
            "area_change_followup_minus_baseline_mm2": self.area_change_mm2,
            "area_change_followup_minus_baseline_percent": self.area_change_percent,
            **{k: self.info[k] for k in ("covered_area_fraction", "overlap_area_fraction",
                                         "volume_note") if k in self.info},
            **field_stats,
            "alignment_rms_mm": float(self.info.get("alignment_rms_mm", float("nan"))),
            "warnings": list(self.info.get("warnings", [])),
            "note": RESEARCH_NOTE,
        }

    # ------------------------------------------------------------ regions
    def regional_table(self, labels: np.ndarray | None = None,
                       names: dict | None = None) -> list[dict]:
        """Per-region change metrics: one dict per label (sorted), or one row "all" without labels.

        Columns: ``label``, ``name`` and the area-weighted metrics of :meth:`metrics`
        (:data:`surfacekit.analysis.metrics.REGION_COLUMNS`).
        """
        labels = self.labels if labels is None else np.asarray(labels)
        names = self.region_names if names is None else names
        if labels is not None and np.shape(labels) != (self.normal_displacement.shape[0],):
            raise ValueError(f"labels must have shape ({self.normal_displacement.shape[0]},), "
                             f"got {np.shape(labels)}")
        return regional_rows(self, labels, names)

    def to_csv(self, path, labels: np.ndarray | None = None, names: dict | None = None) -> Path:
        """Write :meth:`regional_table` as CSV (atomic, 6 significant digits, byte-stable)."""
        return write_csv(path, self.regional_table(labels, names), columns=REGION_COLUMNS)

    # ------------------------------------------------------------ fields and files
    def fields(self) -> dict:
        """Per-baseline-vertex scalar arrays for ``sk.save(baseline, path, fields=...)``."""
        d = self.displacement
        out = {
            "normal_displacement": self.normal_displacement,
            "log_area_ratio": self.log_area_ratio,
            "displacement_x": d[:, 0], "displacement_y": d[:, 1], "displacement_z": d[:, 2],
            "displacement_magnitude": np.linalg.norm(d, axis=1),
            "change_confidence": self.confidence,
        }
        if self.labels is not None:
            out["label"] = self.labels
        return out

    def save(self, path) -> Path:
        """Save to NPZ (arrays plus JSON metadata; readable without pickle)."""
        from ..io.files import save_fields

        meta = {"baseline_volume_mm3": self.baseline_volume_mm3,
                "followup_volume_mm3": self.followup_volume_mm3,
                "baseline_area_mm2": self.baseline_area_mm2,
                "followup_area_mm2": self.followup_area_mm2,
                "region_names": {str(k): v for k, v in self.region_names.items()},
                "info": self.info, "note": RESEARCH_NOTE}
        arrays = {"displacement": self.displacement,
                  "normal_displacement": self.normal_displacement,
                  "log_area_ratio": self.log_area_ratio, "confidence": self.confidence,
                  "vertex_areas": self.vertex_areas, "rigid": self.rigid,
                  "meta": np.array(json.dumps(meta, sort_keys=True, default=json_default))}
        if self.labels is not None:
            arrays["labels"] = self.labels
        return save_fields(path, **arrays)

    @classmethod
    def load(cls, path) -> ChangeReport:
        from ..io.files import load_fields

        try:
            a = load_fields(path)
            meta = json.loads(str(a["meta"]))
            return cls(a["displacement"], a["normal_displacement"], a["log_area_ratio"],
                       a["confidence"], a["vertex_areas"], a["rigid"],
                       meta["baseline_volume_mm3"], meta["followup_volume_mm3"],
                       meta["baseline_area_mm2"], meta["followup_area_mm2"],
                       a.get("labels"), {int(k): v for k, v in meta["region_names"].items()},
                       meta["info"])
        except (KeyError, ValueError, OSError) as exc:
            raise ValueError(f"{path} is not a saved ChangeReport: {exc}") from None


def _check_labels(labels, n: int) -> np.ndarray | None:
    if labels is None:
        return None
    lab = np.asarray(labels)
    if lab.shape != (n,):
        raise ValueError(f"labels must have one entry per baseline vertex ({n}), got {lab.shape}")
    if lab.dtype.kind not in "iu":
        if lab.dtype.kind == "f" and np.all(lab == np.round(lab)):
            lab = lab.astype(np.int64)
        else:
            raise ValueError(f"labels must be integers, got dtype {lab.dtype}")
    return lab.astype(np.int64)


def _mapped_points(baseline: Surface, followup: Surface, moved: np.ndarray, s2t: np.ndarray,
                   rings: int, sigma: float) -> np.ndarray:
    """(n, 3) sub-vertex mapped points of the baseline vertices on the aligned follow-up
    (`moved`: the follow-up vertices in the baseline frame)."""
    smooth = geo.heat_smooth(baseline, moved[s2t] - baseline.vertices, sigma)
    return closest_near(baseline.vertices + smooth, moved, followup.faces, ring_faces(followup, rings),
                        s2t, followup.connectivity.vertex_adjacency(self_loops=True))[0]


def _check_correspondence(baseline: Surface, followup: Surface, corr) -> np.ndarray:
    """The baseline -> follow-up vertex map of `corr`, after checking it fits both surfaces."""
    if not isinstance(corr, Correspondence):
        raise SurfaceError("measure_change needs the correspondence baseline -> follow-up "
                           "(sk.match(baseline, followup), or sk.compare which matches once)")
    n = baseline.n_vertices
    s2t = corr.source_to_target
    if s2t.shape != (n,):
        raise SurfaceError(f"correspondence maps {s2t.shape[0]} source vertices, baseline has {n}")
    if corr.n_target != followup.n_vertices or s2t.max() >= followup.n_vertices:
        raise SurfaceError(f"correspondence has {corr.n_target} target vertices, follow-up has "
                           f"{followup.n_vertices}")
    if getattr(corr, "rigid", None) is None:
        raise SurfaceError("correspondence carries no rigid pose (corr.rigid); use one made by "
                           "sk.match, which fits the pose once")
    return s2t


def _mapped_face_areas(baseline: Surface, mapped: np.ndarray) -> np.ndarray:
    """(m,) signed area of each baseline face's image (negative where the map folds it)."""
    f = baseline.faces
    cross = np.cross(mapped[f[:, 1]] - mapped[f[:, 0]], mapped[f[:, 2]] - mapped[f[:, 0]])
    return 0.5 * np.einsum("ij,ij->i", cross, baseline.face_normals)


def _log_area_ratio(baseline: Surface, mapped: np.ndarray, sigma: float) -> tuple[np.ndarray, int]:
    """Smoothed per-vertex log area ratio of the map, and the number of folded faces."""
    mapped_area = _mapped_face_areas(baseline, mapped)  # signed: flips < 0
    area = baseline.face_areas
    floor = 1e-3 * area  # folded or collapsed mapped faces count as a 1000-fold shrink
    ratio = np.divide(np.maximum(mapped_area, floor), area, out=np.ones_like(area),
                      where=area > 0)
    n_flipped = int(np.sum((mapped_area <= floor) & (area > 0)))
    return geo.heat_smooth(baseline, face_to_vertex_mean(baseline, np.log(ratio)), sigma), n_flipped


def _leave_out_cuts(baseline: Surface, followup: Surface, corr: Correspondence,
                    fields: tuple) -> tuple[dict, list[str]]:
    """Open surfaces: NaN in `fields` near a boundary only one side has; covered areas; warnings.

    A baseline vertex is left out when it lies within one edge ring of a baseline
    boundary while its matched follow-up vertex is not within one ring of a
    follow-up boundary, or the other way round: there one scan has surface the
    other lacks, so no change can be measured.  Where both sides have the boundary
    (the same cut in both scans) the values are kept.  The area change compares the
    region both surfaces cover: the kept baseline vertices, and the follow-up
    vertices that are kept by the same rule read backwards (through the map
    follow-up -> baseline) and whose baseline partner is kept (vertex areas summed;
    counting follow-up vertices rather than the images of baseline triangles keeps
    the estimate from shrinking where the map is not onto).  When one scan covers only
    part of the other (``corr.is_partial``: a cropped scan), the vertices outside the
    map's overlap masks are left out as well.
    """
    s2t, t2s = corr.source_to_target, corr.target_to_source
    band_b, band_f = boundary_band(baseline), boundary_band(followup)
    one_sided = (band_b ^ band_f[s2t]) | ~corr.source_overlap  # no data in the other scan
    for a in fields:
        a[one_sided] = np.nan
    covered_f = ~(band_f ^ band_b[t2s]) & ~one_sided[t2s] & corr.target_overlap
    area_b = float(baseline.vertex_areas[~one_sided].sum())
    area_f = float(followup.vertex_areas[covered_f].sum())
    notes = [n for n in (open_note(baseline, "baseline"), open_note(followup, "follow-up")) if n]
    share = area_b / float(baseline.area)
    info = {"covered_baseline_area_mm2": area_b, "covered_followup_area_mm2": area_f,
            "covered_area_fraction": share, "left_out_vertices": int(one_sided.sum()),
            "volume_note": "volume not reported: " + "; ".join(notes)}
    warnings = [f"{n}; its volume and the volume change are not reported (NaN), the area change "
                f"is measured over the region both surfaces cover ({share:.1%} of the baseline "
                "area), and change values within one edge ring of a boundary that only one scan "
                f"has are left out ({int(one_sided.sum())} baseline vertices, NaN)" for n in notes]
    if corr.is_partial:  # a cropped scan: one plain sentence instead
        cropped_baseline = corr.info.get("partial", {}).get("side") == "source"
        part, whole, mask = (("baseline", followup, corr.target_overlap) if cropped_baseline
                             else ("follow-up", baseline, corr.source_overlap))
        covers = float(whole.vertex_areas[mask].sum() / whole.area)
        info["overlap_area_fraction"] = float(baseline.vertex_areas[corr.source_overlap].sum()
                                              / baseline.area)
        info["volume_note"] += ("; the " + part + " covers only part of the organ (sk.complete "
                                "estimates its volume from the whole scan)")
        warnings = [(f"the {part} covers only part of the other scan (a cropped scan: "
                     f"{covers:.1%} of its area); change is measured over {share:.1%} of the "
                     "baseline's area (the overlap without the band along the cut, where the map "
                     f"ends); elsewhere it is not measured ({int(one_sided.sum())} baseline "
                     "vertices, NaN), and the volume change is not reported")]
    return info, warnings


def measure_change(baseline: Surface, followup: Surface, corr: Correspondence, *,
                   labels: np.ndarray | None = None, names: dict | None = None,
                   smoothing: float | None = None, rings: int = 2) -> ChangeReport:
    """Where and how much a surface changed between two scans, from their correspondence.

    Nothing is matched or fitted again here: the map and the rigid pose are those
    `corr` carries (``sk.match`` fits the pose once, robust to a changing region;
    ``sk.compare`` runs the match for you).  Steps (the choices documented here
    are this library's):

    1. The follow-up is brought into the baseline frame by the inverse of the
       correspondence's rigid pose, ``corr.rigid.inverse()`` (the follow-up is the
       correspondence target).
    2. Sub-vertex mapped points: the vertex-level displacement field (matched
       follow-up vertex minus baseline vertex) is smoothed by implicit heat
       diffusion over ``smoothing`` mm (default: twice the baseline mean edge
       length) to remove the resolution staircase, and each displaced baseline vertex is
       projected onto the closest point of the follow-up triangles touching the
       `rings`-ring of its matched vertex (Ericson 2005, §5.1.5).  This keeps the
       tangential part of the correspondence and makes the normal part exact.
    3. ``normal_displacement = displacement · n`` with n the outward area-weighted
       baseline vertex normal.
    4. ``log_area_ratio``: per baseline face, log(area of the mapped triangle /
       face area) (the Jacobian of the piecewise-linear map), area-averaged to
       vertices and smoothed over the same length as in step 2.
    5. Open surfaces (either side has a boundary): within one edge ring of a
       boundary that only one scan has, the per-vertex fields are NaN (no change
       can be measured where one scan has surface the other lacks; a cut present
       in both scans keeps its values), the metrics and regional rows skip those
       vertices, the volumes and the volume change are NaN with the reason in
       ``info["volume_note"]``, and the area change is measured over the region
       both surfaces cover (``info["covered_area_fraction"]`` of the baseline
       area); a warning names each open side.  Closed pairs are not affected.
       When one scan covers only part of the other (a cropped scan, ``corr.is_partial``,
       from ``sk.match``'s partial route), the baseline vertices outside the map's
       ``source_overlap`` are not measured either (NaN), and the area change counts only
       the follow-up's ``target_overlap``; ``info["covered_area_fraction"]`` says how much
       of the baseline was covered.
    6. ``info["warnings"]`` (also in :meth:`ChangeReport.summary`): plain sentences
       when a surface's size is implausible for an organ, the two differ in scale
       by more than 3x, the alignment residual is large for the organ's size, or a
       volume or area change is so large that a units problem is the likely cause
       (:mod:`surfacekit.analysis.plausibility`).

    Parameters
    ----------
    baseline, followup : Surface (mm), any meshing and pose
    corr : Correspondence baseline -> follow-up with its rigid pose (``corr.rigid``)
    labels : (n,) int region labels on the baseline, optional; names : {label: name}
    smoothing : length (mm) of the smoothing of steps 2 and 4; 0 disables it
    rings : size of the follow-up neighbourhood searched in step 2

    Returns
    -------
    ChangeReport
    """
    if not isinstance(baseline, Surface) or not isinstance(followup, Surface):
        raise SurfaceError("baseline and followup must be Surface objects")
    n = baseline.n_vertices
    lab = _check_labels(labels, n)
    s2t = _check_correspondence(baseline, followup, corr)
    conf = np.ones(n) if corr.source_confidence is None else corr.source_confidence

    pose = corr.rigid.inverse()  # 1. follow-up -> baseline frame
    moved = pose.apply(followup.vertices)
    sigma = 2.0 * baseline.mean_edge_length if smoothing is None else float(smoothing)
    mapped = _mapped_points(baseline, followup, moved, s2t, rings, sigma)  # 2.
    displacement = mapped - baseline.vertices
    normals = outward_vertex_normals(baseline)  # 3.
    normal_displacement = np.einsum("ij,ij->i", displacement, normals)
    log_area_ratio, n_flipped = _log_area_ratio(baseline, mapped, sigma)  # 4.
    open_info, open_warnings = {}, []
    if not (baseline.is_closed and followup.is_closed) or corr.is_partial:  # 5. open surfaces
        open_info, open_warnings = _leave_out_cuts(
            baseline, followup, corr, (displacement, normal_displacement, log_area_ratio))

    weights = getattr(corr.rigid, "weights", None)
    info = {"alignment_rms_mm": float(corr.rigid.rms), "smoothing_mm": sigma,
            "projection_rings": rings, "flipped_faces": n_flipped,
            "robust_inlier_fraction": (float(np.mean(np.asarray(weights) > 0))
                                       if weights is not None else None),
            "correspondence_route": str(corr.info.get("route", "given")), **open_info}
    report = ChangeReport(
        displacement=displacement, normal_displacement=normal_displacement,
        log_area_ratio=log_area_ratio, confidence=conf,
        vertex_areas=np.asarray(baseline.vertex_areas, dtype=np.float64), rigid=pose.matrix,
        baseline_volume_mm3=float(baseline.volume), followup_volume_mm3=float(followup.volume),
        baseline_area_mm2=float(baseline.area), followup_area_mm2=float(followup.area),
        labels=lab, region_names=dict(names or {}), info=info)
    # plain-sentence warnings: implausible sizes, mixed units, a large residual (plausibility)
    info["warnings"] = open_warnings + (pair_warnings(baseline, followup, corr.rigid.rms)
                        + change_value_warnings(report.volume_change_percent,
                                                report.area_change_percent))
    return report
