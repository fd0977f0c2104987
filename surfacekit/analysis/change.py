"""Change between a baseline and a follow-up scan of the same organ.

For research use only; not for diagnosis or treatment decisions.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..mesh.surface import Surface, SurfaceError
from . import geometry as geo
from .alignment import Transform, rigid_transform
from .regions import RESEARCH_NOTE, regional_rows, write_csv


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
    baseline_volume_mm3, followup_volume_mm3, baseline_area_mm2, followup_area_mm2
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
        return 100.0 * (self.followup_volume_mm3 / self.baseline_volume_mm3 - 1.0)

    @property
    def area_change_mm2(self) -> float:
        return self.followup_area_mm2 - self.baseline_area_mm2

    @property
    def area_change_percent(self) -> float:
        return 100.0 * (self.followup_area_mm2 / self.baseline_area_mm2 - 1.0)

    def summary(self) -> dict:
        """Global change and field statistics as a JSON-able dict (with a research-use note)."""
        nd = self.normal_displacement
        w = self.vertex_areas / self.vertex_areas.sum()
        return {
            "n_vertices": int(nd.shape[0]),
            "baseline_volume_ml": self.baseline_volume_mm3 / 1000.0,
            "followup_volume_ml": self.followup_volume_mm3 / 1000.0,
            "volume_change_ml": self.volume_change_ml,
            "volume_change_percent": self.volume_change_percent,
            "baseline_area_mm2": self.baseline_area_mm2,
            "followup_area_mm2": self.followup_area_mm2,
            "area_change_mm2": self.area_change_mm2,
            "area_change_percent": self.area_change_percent,
            "mean_normal_displacement_mm": float(w @ nd),
            "mean_abs_normal_displacement_mm": float(w @ np.abs(nd)),
            "max_normal_displacement_mm": float(nd.max()),
            "min_normal_displacement_mm": float(nd.min()),
            "p95_abs_normal_displacement_mm": float(np.percentile(np.abs(nd), 95)),
            "mapped_area_change_percent": float(100.0 * (w @ np.exp(self.log_area_ratio) - 1.0)),
            "alignment_rms_mm": float(self.info.get("alignment_rms_mm", float("nan"))),
            "note": RESEARCH_NOTE,
        }

    # ------------------------------------------------------------ regions
    def regional_table(self, labels: np.ndarray | None = None,
                       names: dict | None = None) -> list[dict]:
        """Per-region statistics: one dict per label (sorted), or one row "all" without labels.

        Columns: label, name, n_vertices, area_mm2, mean / median / p5 / p95 of the
        normal displacement (mm, area-weighted mean), mean absolute normal
        displacement (mm), area change (%) from the mapped areas, and mean confidence.
        """
        labels = self.labels if labels is None else np.asarray(labels)
        names = self.region_names if names is None else names
        if labels is not None and np.shape(labels) != (self.normal_displacement.shape[0],):
            raise ValueError(f"labels must have shape ({self.normal_displacement.shape[0]},), "
                             f"got {np.shape(labels)}")
        return regional_rows(self.normal_displacement, self.log_area_ratio, self.vertex_areas,
                             self.confidence, labels, names)

    def to_csv(self, path, labels: np.ndarray | None = None, names: dict | None = None) -> Path:
        """Write :meth:`regional_table` as a plain CSV (atomic, byte-stable for equal input)."""
        return write_csv(path, self.regional_table(labels, names))

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
                  "meta": np.array(json.dumps(meta, sort_keys=True, default=float))}
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


def _mapped_points(baseline: Surface, moved: np.ndarray, faces: np.ndarray, s2t: np.ndarray,
                   pairs, sigma: float) -> np.ndarray:
    """(n, 3) sub-vertex mapped points of the baseline vertices on the aligned follow-up."""
    raw = moved[s2t] - baseline.vertices
    smooth = geo.heat_smooth(baseline, raw, sigma)
    return geo.project_pairs(baseline.vertices + smooth, moved, faces, pairs)


def _refine_pose(baseline: Surface, followup: Surface, pairs, conf: np.ndarray,
                 pose: Transform, max_rounds: int = 10, tol_mm: float = 1e-3):
    """Refine the rigid pose by robust point-to-surface rounds along the baseline normals.

    A vertex-level map is off by up to an edge (and by smooth tangential drift
    near changing regions), which tilts a pose fitted to matched vertices.  Each
    round finds, for every baseline vertex, its closest point on the follow-up
    faces near its matched vertex, keeps only the offset along the baseline
    normal (a point-to-plane step in the spirit of Chen & Medioni, Image Vision
    Comput. 1992, with the search limited by the correspondence), and refits the
    Tukey-weighted Kabsch pose, so a changing region still gets weight ~0.
    Tangential offsets are not used: on near-symmetric shapes (a growing sphere)
    closest points would let the pose slide; the tangential pose comes from the map.
    Returns (pose, moved follow-up vertices, rounds used).
    """
    moved = pose.apply(followup.vertices)
    normals = geo.outward_vertex_normals(baseline)
    rounds = 0
    for rounds in range(1, max_rounds + 1):
        foot = geo.project_pairs(baseline.vertices, moved, followup.faces, pairs)
        h = np.einsum("ij,ij->i", foot - baseline.vertices, normals)
        target = baseline.vertices + h[:, None] * normals
        step = rigid_transform(target, baseline.vertices, weights=conf)
        new_pose = Transform(step.rotation @ pose.rotation,
                             step.rotation @ pose.translation + step.translation,
                             1.0, step.weights, step.rms, step.n_iter)
        moved = new_pose.apply(followup.vertices)
        shift = np.abs(step.apply(baseline.vertices) - baseline.vertices).max()
        pose = new_pose
        if shift < tol_mm:
            break
    return pose, moved, rounds


def measure_change(baseline: Surface, followup: Surface, corr=None, *,
                   labels: np.ndarray | None = None, names: dict | None = None, seed: int = 0,
                   options=None, smoothing: float | None = None,
                   rings: int = 2) -> ChangeReport:
    """Where and how much a surface changed between two scans.

    Steps (the choices documented here are this library's):

    1. Correspondence ``baseline -> follow-up`` (`corr`, or ``sk.match(baseline,
       followup, options, seed=seed)``).
    2. Rigid motion removed by a confidence-weighted, Tukey-reweighted Kabsch fit
       of the matched vertex pairs (Kabsch 1976; see :func:`rigid_transform`), so a
       growing region does not bias the pose, then refined by point-to-surface
       rounds along the baseline normals, limited to the map's neighbourhoods.
    3. Sub-vertex mapped points: the vertex-level displacement field (matched
       follow-up vertex minus baseline vertex) is smoothed by implicit heat
       diffusion over ``smoothing`` mm (default: twice the baseline mean edge
       length) to remove the resolution staircase, and each displaced baseline vertex is
       projected onto the closest point of the follow-up triangles touching the
       `rings`-ring of its matched vertex (Ericson 2005, §5.1.5).  This keeps the
       tangential part of the correspondence and makes the normal part exact.
    4. ``normal_displacement = displacement · n`` with n the outward area-weighted
       baseline vertex normal.
    5. ``log_area_ratio``: per baseline face, log(area of the mapped triangle /
       face area) (the Jacobian of the piecewise-linear map), area-averaged to
       vertices and smoothed over the same length as in step 3.

    Parameters
    ----------
    baseline, followup : Surface (mm), any meshing and pose
    corr : Correspondence with ``source_to_target`` of shape (baseline.n_vertices,)
    labels : (n,) int region labels on the baseline, optional; names : {label: name}
    seed, options : for `sk.match` (``sk.MatchOptions``; e.g. ``same_orientation=True``
        for two scans taken in the same scanner orientation)
    smoothing : length (mm) of the smoothing of step 3 and 5; 0 disables it
    rings : size of the follow-up neighbourhood searched in step 3

    Returns
    -------
    ChangeReport
    """
    if not isinstance(baseline, Surface) or not isinstance(followup, Surface):
        raise SurfaceError("baseline and followup must be Surface objects")
    n = baseline.n_vertices
    lab = _check_labels(labels, n)
    if corr is None:
        from ..correspondence import match

        corr = match(baseline, followup, options, seed=seed)
    s2t = np.asarray(corr.source_to_target, dtype=np.int64)
    if s2t.shape != (n,):
        raise SurfaceError(f"correspondence maps {s2t.shape[0]} source vertices, baseline has {n}")
    if s2t.min() < 0 or s2t.max() >= followup.n_vertices:
        raise SurfaceError("correspondence refers to follow-up vertices out of range")
    conf = getattr(corr, "source_confidence", None)
    conf = np.ones(n) if conf is None else np.clip(np.asarray(conf, dtype=np.float64), 0, 1)
    if conf.shape != (n,):
        raise SurfaceError(f"source_confidence has shape {conf.shape}, expected ({n},)")

    # 2. rigid motion follow-up -> baseline frame, robust to the changing region
    pose = rigid_transform(followup.vertices[s2t], baseline.vertices, weights=conf)
    sigma = 2.0 * baseline.mean_edge_length if smoothing is None else float(smoothing)
    pairs = geo.near_faces(followup, s2t, rings)  # the search neighbourhoods, fixed
    pose, moved, n_refine = _refine_pose(baseline, followup, pairs, conf, pose)

    # 3. sub-vertex mapped points
    mapped = _mapped_points(baseline, moved, followup.faces, s2t, pairs, sigma)
    displacement = mapped - baseline.vertices

    # 4. along the outward normal
    normals = geo.outward_vertex_normals(baseline)
    normal_displacement = np.einsum("ij,ij->i", displacement, normals)

    # 5. per-face Jacobian of the map
    f = baseline.faces
    cross = np.cross(mapped[f[:, 1]] - mapped[f[:, 0]], mapped[f[:, 2]] - mapped[f[:, 0]])
    mapped_area = 0.5 * np.einsum("ij,ij->i", cross, baseline.face_normals)  # signed: flips < 0
    area = baseline.face_areas
    floor = 1e-3 * area  # folded or collapsed mapped faces count as a 1000-fold shrink
    ratio = np.divide(np.maximum(mapped_area, floor), area, out=np.ones_like(area),
                      where=area > 0)
    n_flipped = int(np.sum((mapped_area <= floor) & (area > 0)))
    log_area_ratio = geo.heat_smooth(baseline, geo.face_to_vertex(baseline, np.log(ratio)), sigma)

    confidence = conf
    info = {"alignment_rms_mm": pose.rms, "pose_refinements": n_refine,
            "smoothing_mm": sigma, "projection_rings": rings, "flipped_faces": n_flipped,
            "robust_inlier_fraction": float(np.mean(pose.weights > 0)),
            "correspondence_route": str(dict(getattr(corr, "info", {}) or {}).get("route", "given"))}
    return ChangeReport(
        displacement=displacement, normal_displacement=normal_displacement,
        log_area_ratio=log_area_ratio, confidence=confidence,
        vertex_areas=np.asarray(baseline.vertex_areas, dtype=np.float64), rigid=pose.matrix,
        baseline_volume_mm3=float(baseline.volume), followup_volume_mm3=float(followup.volume),
        baseline_area_mm2=float(baseline.area), followup_area_mm2=float(followup.area),
        labels=lab, region_names=dict(names or {}), info=info)
