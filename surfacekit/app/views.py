"""Report panels and figures for the main results: a correspondence, a change, a cohort test.

Shared by the command line and the demo; the HTML assembly lives in
:mod:`surfacekit.app.report`, the matplotlib drawing in :mod:`surfacekit.app.figures`.
"""
from __future__ import annotations

import numpy as np

from ..correspondence.evaluation import face_distortion
from ..mesh.laplacian import face_to_vertex_mean
from ..mesh.surface import Surface
from . import figures as figs
from .panels import ReportLayer, ReportPanel
from .partial_views import covered_layer


def colour_fields(surface: Surface) -> tuple[np.ndarray, np.ndarray]:
    """Two smooth colour fields to show a correspondence by transfer.

    Returns the position along the surface's longest principal axis, scaled to
    [0, 1], ``(n,)``, and the angle around that axis in degrees ``(n,)`` in
    [-180, 180) (cyclic).  Principal axes: eigenvectors of the vertex
    covariance (common practice); signs fixed by the third moment so the
    fields do not depend on the mesh's pose.
    """
    v = surface.vertices - surface.vertices.mean(axis=0)
    _, vecs = np.linalg.eigh(np.cov(v.T))
    axes = vecs[:, ::-1]
    proj = v @ axes
    signs = np.sign(np.sum(proj**3, axis=0))
    signs[signs == 0] = 1.0
    proj = proj * signs
    along = (proj[:, 0] - proj[:, 0].min()) / max(float(np.ptp(proj[:, 0])), 1e-12)
    around = np.degrees(np.arctan2(proj[:, 2], proj[:, 1]))
    return along, around


def map_distortion(source: Surface, target: Surface, source_to_target: np.ndarray) -> np.ndarray:
    """Per-source-vertex area distortion of a point map, ``(n_source,)``, log2 units.

    The area ratio σ1σ2 of the piecewise-linear map on each source face, both
    surfaces scaled to unit area (:func:`surfacekit.correspondence.evaluation.face_distortion`,
    the measure behind ``map_quality``), as log2 and averaged over the faces
    around each vertex weighted by face area.  0 = area kept, +1 = twice the
    area, -1 = half; a map that folds a face shows as strongly negative
    (ratios are clipped to [2^-8, 2^8]).
    """
    sigma, weights = face_distortion(source, target, source_to_target)
    ratio = np.clip(sigma[:, 0] * sigma[:, 1], 2.0**-8, 2.0**8)
    log_ratio = np.log2(np.where(weights > 0, ratio, 1.0))  # degenerate source faces: 0
    return face_to_vertex_mean(source, log_ratio)


def correspondence_layers(source: Surface, target: Surface, corr) -> list[ReportLayer]:
    """Layers showing a correspondence: colour fields transferred, confidence, distortion."""
    along, around = colour_fields(source)
    layers = [
        ReportLayer("correspondence: position along the long axis",
                    [along, np.asarray(corr.transfer(along), dtype=float)], kind="sequential",
                    description="A colour field painted on the first surface and carried to the "
                                "second by the map: matching colours mean matched points."),
        ReportLayer("correspondence: angle around the long axis",
                    [around, np.asarray(corr.transfer(around), dtype=float)], kind="cyclic",
                    unit="degrees", limits=(-180.0, 180.0),
                    description="A cyclic colour field carried by the map; twists or flips of the "
                                "map show as rotated colours."),
    ]
    conf_s = getattr(corr, "source_confidence", None)
    conf_t = getattr(corr, "confidence", None)
    if conf_s is not None or conf_t is not None:
        layers.append(ReportLayer("map confidence", [conf_s, conf_t], kind="sequential",
                                  limits=(0.0, 1.0),
                                  description="Per-vertex confidence of the map in [0, 1]."))
    layers.append(ReportLayer("map distortion (area)",
                              [map_distortion(source, target, corr.source_to_target), None],
                              kind="diverging", unit="log2",
                              description="Log2 area ratio of the mapped triangles, both surfaces "
                                          "scaled to unit area: 0 keeps area, red is stretched, "
                                          "blue compressed."))
    covered = covered_layer(corr)  # a cropped scan: where both have data
    return layers if covered is None else [covered, *layers]


def correspondence_panel(source_name: str, source: Surface, target_name: str, target: Surface,
                         corr) -> ReportPanel:
    return ReportPanel(f"Correspondence {source_name} → {target_name}",
                       [(source_name, source), (target_name, target)],
                       correspondence_layers(source, target, corr),
                       note="Drag to rotate, scroll to zoom; both surfaces are shown in their own "
                            "pose, side by side.")


def change_panel(baseline_name: str, baseline: Surface, followup_name: str, followup: Surface,
                 corr, change, labels: np.ndarray | None = None,
                 label_names: dict[int, str] | None = None) -> ReportPanel:
    """Change maps on the baseline (and carried to the follow-up) plus the map's own layers."""
    nd = np.asarray(change.normal_displacement, dtype=float)
    layers = [
        ReportLayer("normal displacement", [nd, np.asarray(corr.transfer(nd), dtype=float)],
                    kind="diverging", unit="mm",
                    description="Movement along the outward normal from baseline to follow-up "
                                "after rigid alignment: red outward (growth), blue inward."),
        ReportLayer("local area change", [np.asarray(change.log_area_ratio, dtype=float), None],
                    kind="diverging", unit="log ratio",
                    description="Log of follow-up over baseline area around each vertex."),
        ReportLayer("displacement magnitude",
                    [np.linalg.norm(np.asarray(change.displacement, dtype=float), axis=1), None],
                    kind="sequential", unit="mm",
                    description="Length of the displacement after rigid alignment."),
    ]
    if labels is not None:
        label_names = label_names or getattr(change, "region_names", None) or None
        carried = np.asarray(corr.transfer(np.asarray(labels), labels=True))
        layers.append(ReportLayer("regions", [np.asarray(labels), carried], kind="labels",
                                  label_names=label_names,
                                  description="Regions transferred from the labelled template."))
    layers += correspondence_layers(baseline, followup, corr)
    rigid = getattr(change, "rigid", None)
    shown = followup
    if rigid is not None:  # show the follow-up in the baseline's frame, as the change is measured
        r = np.asarray(rigid, dtype=float)
        shown = followup.copy_with(vertices=followup.vertices @ r[:3, :3].T + r[:3, 3])
    return ReportPanel(f"Change {baseline_name} → {followup_name}",
                       [(baseline_name, baseline), (followup_name, shown)], layers,
                       note="The follow-up is shown rigidly aligned to the baseline, as the "
                            "change is measured; drag to rotate, scroll to zoom.")


def change_figures(baseline: Surface, change, regional: list[dict] | None = None,
                   corr=None) -> dict:
    """PNG figures (matplotlib) of a change result, keyed by caption."""
    nd = np.asarray(change.normal_displacement, dtype=float)
    measured = np.isfinite(nd)
    out = {
        "Normal displacement on the baseline (mm)":
            figs.surface_figure(baseline, nd, title="normal displacement", kind="diverging",
                                unit="mm"),
        "Distribution of normal displacement (area-weighted)":  # NaN: left out near a cut
            figs.histogram_figure(nd[measured], title="normal displacement", unit="mm",
                                  weights=baseline.vertex_areas[measured], centre_zero=True),
    }
    if regional:
        key = next((k for k in regional[0] if "normal" in k and "mean" in k), None)
        name_key = next((k for k in ("name", "region", "label") if k in regional[0]), None)
        if key and name_key:
            out["Mean normal displacement per region"] = figs.bar_figure(
                [r[name_key] for r in regional], [r[key] for r in regional],
                title="mean normal displacement", unit="mm")
    if corr is not None and getattr(corr, "confidence", None) is not None:
        out["Map confidence (follow-up vertices)"] = figs.histogram_figure(
            corr.confidence, title="map confidence")
    return out


def group_test_panel(template_name: str, template: Surface, result, mean_difference=None,
                     labels=None, label_names=None, groups: tuple[str, str] = ("A", "B")
                     ) -> ReportPanel:
    """Vertex-wise group statistics on the template: t, corrected p-values, mean difference.

    ``result`` follows :func:`surfacekit.vertexwise_group_test`: its ``t`` is
    ``groups[0] - groups[1]`` (group_a minus group_b), shown as it is, so red is where
    ``groups[0]`` lies further outward.  ``mean_difference`` must be
    ``mean(groups[0]) - mean(groups[1])``.  (``group_test.csv`` of a cohort holds
    ``t_<second>_minus_<first>``: pass ``groups=(second, first)``.)
    """
    contrast = f"{groups[0]} − {groups[1]}"
    layers = [ReportLayer(f"t statistic ({contrast})", [np.asarray(result.t, dtype=float)],
                          kind="diverging",
                          description=f"Vertex-wise two-sample t statistic of {contrast}: red "
                                      f"where {groups[0]} lies further outward.")]
    if mean_difference is not None:
        layers.append(ReportLayer(f"mean difference ({contrast})",
                                  [np.asarray(mean_difference, dtype=float)], kind="diverging",
                                  unit="mm", description="Difference of the group means of the "
                                                         "normal displacement."))
    for attr, title in (("p_fwer", "-log10 p (FWER, max-T permutation)"),
                        ("q_fdr", "-log10 q (FDR, Benjamini-Hochberg)")):
        value = getattr(result, attr, None)
        if value is not None:
            layers.append(ReportLayer(title, [-np.log10(np.clip(np.asarray(value, float), 1e-12, 1))],
                                      kind="sequential", limits=(0.0, 3.0),
                                      description="1.3 corresponds to 0.05."))
    if labels is not None:
        layers.append(ReportLayer("regions", [np.asarray(labels)], kind="labels",
                                  label_names=label_names, description="Template regions."))
    return ReportPanel(f"Group statistics on {template_name}", [(template_name, template)], layers)


TRUST_TABLE = "How far to trust the map"
TRUST_KEYS = ("map_quality", "map_notes", "map_notes_text")


def map_trust(corr, source: Surface | None = None, target: Surface | None = None) -> dict:
    """Summary entries saying how far to trust a map (JSON-able).

    ``rotation_ambiguous`` / ``rotation_note`` (the turn/flip ambiguity of the
    match), ``low_confidence`` / ``low_confidence_note`` (the surfaces do not look
    like the same organ), and with both surfaces the cheap quality numbers
    (:func:`surfacekit.correspondence.evaluation.quick_map_quality`, no geodesics),
    ``map_notes`` (measure, value, verdict, meaning, rule of thumb) and
    ``map_notes_text`` (the same as plain sentences).
    """
    from ..correspondence.evaluation import map_note_lines, map_notes, quick_map_quality, turn_note

    info = getattr(corr, "info", {}) or {}
    out: dict = {}
    amb = info.get("rotation_ambiguity")
    if amb:  # the shapes leave a turn of the map open (see sk.AmbiguousMatchWarning)
        out["rotation_ambiguous"] = bool(amb["ambiguous"])
        note = turn_note(info)
        if note:
            out["rotation_note"] = note
    check = info.get("match_check")
    if check:  # the surfaces may not be the same organ at all (see sk.NoMatchWarning)
        out["low_confidence"] = bool(check["low_confidence"])
        if check["low_confidence"]:
            out["low_confidence_note"] = check["note"]
    if source is not None and target is not None:
        quality = quick_map_quality(source, target, corr)
        notes = map_notes(quality, info)
        out.update(map_quality=quality, map_notes=notes, map_notes_text=map_note_lines(notes))
    return out


def trust_report_parts(trust: dict) -> tuple[dict, dict]:
    """``(summary entries, {caption: rows})`` of :func:`map_trust` for a report.

    The summary keeps the turn note and one plain verdict per measure; the
    table lists each measure with its meaning and rule of thumb.
    """
    summary = {k: v for k, v in trust.items() if k not in TRUST_KEYS}
    notes = trust.get("map_notes") or []
    for n in notes:
        value = n["value"] if isinstance(n["value"], str) else f"{n['value']:.3g}"
        summary[f"map {n['measure']}"] = f"{value} ({n['verdict']})"
    rows = [{"measure": n["measure"], "value": n["value"], "verdict": n["verdict"],
             "meaning": n["meaning"], "rule of thumb": n["rule"]} for n in notes]
    return summary, ({TRUST_TABLE: rows} if rows else {})
