"""3D panels of the HTML report: per-vertex fields on surfaces as plotly ``mesh3d`` traces.

A :class:`ReportPanel` shows surfaces side by side with a menu of
:class:`ReportLayer` fields; :func:`panel_spec` turns it into the plotly figure
(plain dicts) and one restyle update per field, which the report embeds as JSON.
"""
from __future__ import annotations

import html
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..mesh.surface import Surface

# Colour scales (our own choices).  Diverging: blue (shrinking / inward) to red
# (growing / outward) through a warm white at exactly zero.
DIVERGING = [[0.0, "#24528c"], [0.25, "#7ba7cf"], [0.5, "#f4f1ec"], [0.75, "#e39a6f"],
             [1.0, "#a3301e"]]
SEQUENTIAL = [[0.0, "#fbf3d8"], [0.35, "#9fd0b4"], [0.7, "#3b8c8c"], [1.0, "#1d3557"]]
CYCLIC = [[0.0, "#d1495b"], [0.25, "#edae49"], [0.5, "#66a182"], [0.75, "#2e4057"],
          [1.0, "#d1495b"]]
LABEL_COLOURS = ["#c8c8c8", "#3d7ea6", "#e0a030", "#6aa84f", "#b5527a", "#7d6bb3", "#4fb0a5",
                 "#c8664a", "#8c8c3a", "#5a6f8c"]
NEUTRAL = [[0.0, "#cfd4d8"], [1.0, "#cfd4d8"]]
#: colour of vertices whose value was not measured (NaN), e.g. beyond a cropped scan
MISSING = "#b4b4b4"
#: share of the colour bar taken by the grey "not measured" band
MISSING_BAND = 0.06
KINDS = ("diverging", "sequential", "labels", "cyclic")


@dataclass
class ReportLayer:
    """One per-vertex field shown on the surfaces of a panel.

    ``values`` holds one array per surface of the panel ((n_i,) each) or None
    where the field is not defined on that surface.  ``kind``: "diverging"
    (change maps; symmetric range centred on zero), "sequential" (confidence,
    distortion), "labels" (integer regions) or "cyclic" (angles, colour fields
    for correspondence).
    """

    name: str
    values: Sequence[np.ndarray | None]
    kind: str = "sequential"
    unit: str = ""
    description: str = ""
    label_names: dict[int, str] | None = None
    limits: tuple[float, float] | None = None


@dataclass
class ReportPanel:
    """An interactive 3D view: surfaces side by side and a menu of fields."""

    title: str
    surfaces: Sequence[tuple[str, Surface]]
    layers: Sequence[ReportLayer]
    note: str = ""


def esc(value: Any) -> str:
    """HTML-escape any value (quotes included)."""
    return html.escape(str(value), quote=True)


def _rounded(values: np.ndarray, digits: int = 4) -> list:
    """Values rounded to about `digits` significant digits (smaller HTML, exact JSON)."""
    v = np.asarray(values, dtype=np.float64)
    v = np.where(np.isfinite(v), v, 0.0)
    big = float(np.max(np.abs(v))) if v.size else 0.0
    if big == 0.0:
        return v.tolist()
    decimals = int(max(0, digits - 1 - np.floor(np.log10(big))))
    return np.round(v, decimals).tolist()


# ------------------------------------------------------------------ 3D panels
def _layer_style(layer: ReportLayer) -> dict:
    """Colour scale and limits of a layer (shared by all surfaces of the panel)."""
    if layer.kind not in KINDS:
        raise ValueError(f"unknown report layer kind {layer.kind!r}; use one of {KINDS}")
    defined = [np.asarray(v, dtype=float) for v in layer.values if v is not None]
    data = np.concatenate([d[np.isfinite(d)] for d in defined]) if defined else np.zeros(1)
    if data.size == 0:
        data = np.zeros(1)
    style: dict[str, Any] = {"tickvals": None, "ticktext": None}
    if layer.kind == "labels":
        # categorical: one flat band per region present, in order, named on the colour bar
        present = sorted({int(v) for v in np.unique(data)})
        scale = []
        for i, lab in enumerate(present):
            c = LABEL_COLOURS[lab % len(LABEL_COLOURS)]
            scale += [[i / len(present), c], [(i + 1) / len(present), c]]
        style.update(colorscale=scale, cmin=-0.5, cmax=len(present) - 0.5, present=present,
                     tickvals=list(range(len(present))),
                     ticktext=[(layer.label_names or {}).get(i, f"region {i}") for i in present])
    elif layer.kind == "diverging":
        # symmetric limits put zero exactly at the middle (white) of the scale
        m = float(np.percentile(np.abs(data), 99)) if layer.limits is None else max(map(abs, layer.limits))
        m = m if m > 0 else 1.0
        style.update(colorscale=DIVERGING, cmin=-m, cmax=m)
    else:
        lo, hi = ((float(np.percentile(data, 1)), float(np.percentile(data, 99)))
                  if layer.limits is None else map(float, layer.limits))
        if hi <= lo:
            hi = lo + 1.0
        style.update(colorscale=CYCLIC if layer.kind == "cyclic" else SEQUENTIAL, cmin=lo, cmax=hi)
    return style


def scale_caption(layer: ReportLayer, style: dict, surfaces: list) -> str:
    """The field's name, its description and a sentence on its colour scale (shown under the menu)."""
    unit = f" {layer.unit}" if layer.unit else ""
    if layer.kind == "diverging":
        scale = (f"Colour: diverging scale centred on zero (white = no change, red positive, "
                 f"blue negative), limits ±{style['cmax']:.3g}{unit}.")
    elif layer.kind == "labels":
        scale = f"Colour: one colour per region ({', '.join(style['ticktext'])})."
    elif layer.kind == "cyclic":
        scale = (f"Colour: cyclic scale from {style['cmin']:.3g} to {style['cmax']:.3g}{unit}; "
                 f"the two ends have the same colour.")
    else:
        scale = (f"Colour: sequential scale from {style['cmin']:.3g} (light) to "
                 f"{style['cmax']:.3g}{unit} (dark).")
    missing = [name for (name, _), v in zip(surfaces, layer.values) if v is None]
    if missing:
        scale += f" Not defined on {', '.join(missing)} (shown grey)."
    if has_missing(layer):
        scale += (" Grey (the band below the colour bar): not measured, where the other scan has "
                  "no surface (a cropped scan) or along a cut only one scan has.")
    name = f"{layer.name} ({layer.unit})" if layer.unit else layer.name
    return " ".join(t for t in (f"{name[:1].upper()}{name[1:]}:", layer.description.strip(), scale)
                    if t)


def has_missing(layer: ReportLayer) -> bool:
    """Whether a non-label layer has values that were not measured (NaN) on some surface."""
    return layer.kind != "labels" and any(
        v is not None and not np.all(np.isfinite(np.asarray(v, dtype=float))) for v in layer.values)


def _with_missing_band(scale: list, lo: float, hi: float) -> tuple[list, float, float]:
    """The colour scale with a grey band below its low end, the new low end, and the value
    (inside the band) that stands for "not measured"."""
    g = MISSING_BAND
    new_lo = lo - g / (1.0 - g) * (hi - lo)
    banded = [[0.0, MISSING], [g, MISSING]] + [[g + (1.0 - g) * p, c] for p, c in scale]
    return banded, new_lo, 0.5 * (new_lo + lo)


def _grey_faces(faces: np.ndarray, vals: np.ndarray, sentinel: float) -> np.ndarray:
    """Per-face values (mean of the corners) with `sentinel` on faces touching a NaN corner."""
    face_vals = vals[faces].mean(axis=1)
    return np.where(np.isfinite(face_vals), face_vals, sentinel)


def _face_labels(faces: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """Label of each triangle: the label shared by at least two of its corners, else the first."""
    a, b, c = labels[faces[:, 0]], labels[faces[:, 1]], labels[faces[:, 2]]
    return np.where((b == c) & (a != b), b, a)


def _offsets(surfaces: list) -> tuple[list[np.ndarray], float]:
    """Shifts placing the surfaces side by side along x, and the gap between them (mm)."""
    extents = [np.ptp(s.vertices, axis=0) for _, s in surfaces]
    gap = 0.25 * max(float(e.max()) for e in extents)
    offsets, x_cursor = [], 0.0
    for (_, s), ext in zip(surfaces, extents):
        centre = 0.5 * (s.vertices.min(axis=0) + s.vertices.max(axis=0))
        offsets.append(np.array([x_cursor + ext[0] / 2, 0.0, 0.0]) - centre)
        x_cursor += ext[0] + gap
    return offsets, gap


def _layer_update(layer: ReportLayer, surfaces: list) -> dict:
    """The plotly restyle update showing one layer on every surface of the panel."""
    if len(layer.values) != len(surfaces):
        raise ValueError(f"layer {layer.name!r} has {len(layer.values)} arrays for "
                         f"{len(surfaces)} surfaces")
    style = _layer_style(layer)
    title = f"{layer.name} ({layer.unit})" if layer.unit else layer.name
    upd: dict[str, list] = {k: [] for k in ("intensity", "intensitymode", "colorscale",
                                            "cmin", "cmax", "showscale", "colorbar.title.text",
                                            "colorbar.tickvals", "colorbar.ticktext")}
    last_defined = max((i for i, v in enumerate(layer.values) if v is not None), default=-1)
    banded = has_missing(layer)
    if banded:
        band_scale, band_lo, sentinel = _with_missing_band(style["colorscale"], style["cmin"],
                                                           style["cmax"])
    for i, ((name, s), values) in enumerate(zip(surfaces, layer.values)):
        if values is None:
            vals, scale, lo, hi = np.zeros(s.n_vertices), NEUTRAL, 0.0, 1.0
        else:
            vals = np.asarray(values, dtype=float).reshape(-1)
            if vals.shape[0] != s.n_vertices:
                raise ValueError(f"layer {layer.name!r} has {vals.shape[0]} values for "
                                 f"surface {name!r} with {s.n_vertices} vertices")
            scale, lo, hi = style["colorscale"], style["cmin"], style["cmax"]
        mode = "vertex"
        if banded and values is not None:  # NaN shown grey, with a band on the colour bar
            scale, lo = band_scale, band_lo
            if not np.all(np.isfinite(vals)):
                vals, mode = _grey_faces(s.faces, vals, sentinel), "cell"
        if layer.kind == "labels" and values is not None:
            # one flat colour per triangle: interpolating labels across a face would
            # paint the colours of unrelated labels along region borders
            vals, mode = _face_labels(s.faces, vals), "cell"
            vals = np.searchsorted(style["present"], vals).astype(float)
        upd["intensity"].append(_rounded(vals))
        upd["intensitymode"].append(mode)
        upd["colorscale"].append(scale)
        upd["cmin"].append(lo)
        upd["cmax"].append(hi)
        upd["showscale"].append(i == last_defined)
        upd["colorbar.title.text"].append(esc(title))
        ticks, texts = style["tickvals"], style["ticktext"]
        if banded and values is not None:
            ticks = [sentinel, style["cmin"], 0.5 * (style["cmin"] + style["cmax"]), style["cmax"]]
            texts = ["not measured"] + [f"{t:.3g}" for t in ticks[1:]]
        upd["colorbar.tickvals"].append(ticks)
        upd["colorbar.ticktext"].append([esc(t) for t in texts] if texts else None)
    return upd


def _trace(name: str, v: np.ndarray, faces: np.ndarray, first: dict, i: int) -> dict:
    """The mesh3d trace of surface i, coloured by the panel's first layer."""
    return {
        "type": "mesh3d", "name": esc(name), "x": _rounded(v[:, 0], 6),
        "y": _rounded(v[:, 1], 6), "z": _rounded(v[:, 2], 6),
        "i": faces[:, 0].tolist(), "j": faces[:, 1].tolist(), "k": faces[:, 2].tolist(),
        "intensity": first["intensity"][i], "intensitymode": first["intensitymode"][i],
        "colorscale": first["colorscale"][i], "cmin": first["cmin"][i],
        "cmax": first["cmax"][i], "showscale": first["showscale"][i],
        "colorbar": {"title": {"text": first["colorbar.title.text"][i]},
                     "tickvals": first["colorbar.tickvals"][i],
                     "ticktext": first["colorbar.ticktext"][i], "len": 0.8},
        "hovertemplate": "%{intensity:.3g}<extra>" + esc(name) + "</extra>",
        "lighting": {"ambient": 0.55, "diffuse": 0.7, "specular": 0.15, "roughness": 0.6},
        "lightposition": {"x": 1000, "y": 1000, "z": 2000}, "flatshading": False,
    }


def panel_spec(panel: ReportPanel, div_id: str) -> dict:
    """Plotly figure (dicts) plus one restyle update per layer, for the report's loader."""
    if not panel.layers:
        raise ValueError(f"report panel {panel.title!r} has no fields to show")
    surfaces = list(panel.surfaces)
    offsets, gap = _offsets(surfaces)
    updates = [_layer_update(layer, surfaces) for layer in panel.layers]
    captions = [scale_caption(layer, _layer_style(layer), surfaces) for layer in panel.layers]
    traces, annotations = [], []
    for i, ((name, s), offset) in enumerate(zip(surfaces, offsets)):
        v = s.vertices + offset
        traces.append(_trace(name, v, s.faces, updates[0], i))
        top = v[np.argmax(v[:, 2])]
        annotations.append({"x": float(top[0]), "y": float(top[1]), "z": float(top[2]) + 0.1 * gap,
                            "text": f"<b>{esc(name)}</b>", "showarrow": False,
                            "font": {"size": 13, "color": "#1f2a33"}})
    axis = {"visible": False, "showbackground": False}
    layout = {"margin": {"l": 0, "r": 0, "t": 0, "b": 0}, "paper_bgcolor": "#ffffff",
              "autosize": True,
              "scene": {"xaxis": axis, "yaxis": axis, "zaxis": axis, "aspectmode": "data",
                        "annotations": annotations,
                        "camera": {"eye": {"x": 0.0, "y": -1.75, "z": 0.85}},
                        "domain": {"x": [0.0, 0.84], "y": [0.0, 1.0]}}}
    return {"div": div_id, "figure": {"data": traces, "layout": layout},
            "layers": [{"update": u, "traces": list(range(len(surfaces))),
                        "description": layer.description, "caption": caption}
                       for u, layer, caption in zip(updates, panel.layers, captions)]}
