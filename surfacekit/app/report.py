"""Self-contained HTML reports: interactive 3D surfaces, tables, PNG figures, provenance.

The 3D view uses plotly.js (MIT licence), embedded inline from the ``plotly``
Python package, so the single HTML file opens offline with no network access.
It was chosen because it ships a ready-made, offline-embeddable WebGL mesh trace
(``mesh3d``) with per-vertex scalar colouring, colour bars and camera controls,
and because the Python package bundles the exact JavaScript build (no CDN).

Every user-provided string (file names, labels, subject ids, table cells) is
HTML-escaped; JSON placed inside ``<script>`` elements has ``<``, ``>`` and
``&`` escaped as ``\\u003c`` etc., so a name like ``<script>alert(1)</script>.ply``
is shown as text and never executed.

Research use only: reports carry that caution at the top.
"""
from __future__ import annotations

import base64
import html
import io
import json
import platform
import re
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

from ..io.files import atomic_path
from ..mesh.surface import Surface

CAUTION = ("Research use only: these results come from research data processing and are not "
           "for diagnosis or treatment decisions. Any clinical use must follow local regulations "
           "and the judgement of qualified professionals.")

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


@dataclass
class _Page:
    parts: list[str] = field(default_factory=list)

    def add(self, text: str) -> None:
        self.parts.append(text)


def esc(value: Any) -> str:
    """HTML-escape any value (quotes included)."""
    return html.escape(str(value), quote=True)


def _script_json(obj: Any) -> str:
    text = json.dumps(obj, separators=(",", ":"), allow_nan=False)
    return text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")


def _rounded(values: np.ndarray, digits: int = 4) -> list:
    """Values rounded to about `digits` significant digits (smaller HTML, exact JSON)."""
    v = np.asarray(values, dtype=np.float64)
    v = np.where(np.isfinite(v), v, 0.0)
    big = float(np.max(np.abs(v))) if v.size else 0.0
    if big == 0.0:
        return v.tolist()
    decimals = int(max(0, digits - 1 - np.floor(np.log10(big))))
    return np.round(v, decimals).tolist()


def slug(text: str) -> str:
    """A file-name-safe version of a caption."""
    s = re.sub(r"[^A-Za-z0-9]+", "_", text).strip("_").lower()
    return s[:60] or "figure"


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
        lo, hi = int(data.min()), int(max(data.max(), data.min() + 1))
        span = hi - lo + 1
        scale = []
        for i in range(span):  # stepped scale: one flat band per label value
            c = LABEL_COLOURS[(lo + i) % len(LABEL_COLOURS)]
            scale += [[i / span, c], [(i + 1) / span, c]]
        present = sorted({int(v) for v in np.unique(data)})
        style.update(colorscale=scale, cmin=lo - 0.5, cmax=hi + 0.5, tickvals=present,
                     ticktext=[(layer.label_names or {}).get(i, str(i)) for i in present])
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


def _face_labels(faces: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """Label of each triangle: the label shared by at least two of its corners, else the first."""
    a, b, c = labels[faces[:, 0]], labels[faces[:, 1]], labels[faces[:, 2]]
    return np.where((b == c) & (a != b), b, a)


def _panel_spec(panel: ReportPanel, div_id: str) -> dict:
    """Plotly figure (dicts) plus one restyle update per layer."""
    if not panel.layers:
        raise ValueError(f"report panel {panel.title!r} has no fields to show")
    surfaces = list(panel.surfaces)
    extents = [np.ptp(s.vertices, axis=0) for _, s in surfaces]
    gap = 0.25 * max(float(e.max()) for e in extents)
    traces, annotations, x_cursor = [], [], 0.0
    offsets = []
    for (name, s), ext in zip(surfaces, extents):
        centre = 0.5 * (s.vertices.min(axis=0) + s.vertices.max(axis=0))
        offset = np.array([x_cursor + ext[0] / 2, 0.0, 0.0]) - centre
        offsets.append(offset)
        x_cursor += ext[0] + gap
    updates = []
    for layer in panel.layers:
        if len(layer.values) != len(surfaces):
            raise ValueError(f"layer {layer.name!r} has {len(layer.values)} arrays for "
                             f"{len(surfaces)} surfaces")
        style = _layer_style(layer)
        title = f"{layer.name} ({layer.unit})" if layer.unit else layer.name
        upd: dict[str, list] = {k: [] for k in ("intensity", "intensitymode", "colorscale",
                                                "cmin", "cmax", "showscale", "colorbar.title.text",
                                                "colorbar.tickvals", "colorbar.ticktext")}
        last_defined = max((i for i, v in enumerate(layer.values) if v is not None), default=-1)
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
            if layer.kind == "labels" and values is not None:
                # one flat colour per triangle: interpolating labels across a face would
                # paint the colours of unrelated labels along region borders
                vals, mode = _face_labels(s.faces, vals), "cell"
            upd["intensity"].append(_rounded(vals))
            upd["intensitymode"].append(mode)
            upd["colorscale"].append(scale)
            upd["cmin"].append(lo)
            upd["cmax"].append(hi)
            upd["showscale"].append(i == last_defined)
            upd["colorbar.title.text"].append(esc(title))
            upd["colorbar.tickvals"].append(style["tickvals"])
            upd["colorbar.ticktext"].append([esc(t) for t in style["ticktext"]]
                                            if style["ticktext"] else None)
        updates.append({"update": upd, "description": layer.description, "name": layer.name})
    first = updates[0]["update"]
    for i, ((name, s), offset) in enumerate(zip(surfaces, offsets)):
        v = s.vertices + offset
        traces.append({
            "type": "mesh3d", "name": esc(name), "x": _rounded(v[:, 0], 6),
            "y": _rounded(v[:, 1], 6), "z": _rounded(v[:, 2], 6),
            "i": s.faces[:, 0].tolist(), "j": s.faces[:, 1].tolist(), "k": s.faces[:, 2].tolist(),
            "intensity": first["intensity"][i], "intensitymode": first["intensitymode"][i],
            "colorscale": first["colorscale"][i], "cmin": first["cmin"][i],
            "cmax": first["cmax"][i], "showscale": first["showscale"][i],
            "colorbar": {"title": {"text": first["colorbar.title.text"][i]},
                         "tickvals": first["colorbar.tickvals"][i],
                         "ticktext": first["colorbar.ticktext"][i], "len": 0.8},
            "hovertemplate": "%{intensity:.3g}<extra>" + esc(name) + "</extra>",
            "lighting": {"ambient": 0.55, "diffuse": 0.7, "specular": 0.15, "roughness": 0.6},
            "lightposition": {"x": 1000, "y": 1000, "z": 2000}, "flatshading": False,
        })
        top = v[np.argmax(v[:, 2])]
        annotations.append({"x": float(top[0]), "y": float(top[1]), "z": float(top[2]) + 0.1 * gap,
                            "text": f"<b>{esc(name)}</b>", "showarrow": False,
                            "font": {"size": 13, "color": "#1f2a33"}})
    axis = {"visible": False, "showbackground": False}
    layout = {"margin": {"l": 0, "r": 0, "t": 10, "b": 0}, "paper_bgcolor": "#ffffff",
              "scene": {"xaxis": axis, "yaxis": axis, "zaxis": axis, "aspectmode": "data",
                        "annotations": annotations,
                        "camera": {"eye": {"x": 0.0, "y": -1.6, "z": 0.9}}}}
    return {"div": div_id, "figure": {"data": traces, "layout": layout},
            "layers": [{"update": u["update"], "traces": list(range(len(surfaces))),
                        "description": u["description"]} for u in updates]}


# ------------------------------------------------------------------ HTML parts
def _fmt(value: Any) -> str:
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if not np.isfinite(v):
            return str(v)
        return f"{v:.4g}" if abs(v) < 1e5 else f"{v:.4e}"
    if value is None:
        return ""
    if isinstance(value, (list, tuple)):
        return ", ".join(_fmt(v) for v in value)
    return str(value)


def html_table(rows: Sequence[dict] | dict, *, columns: Sequence[str] | None = None) -> str:
    """An escaped HTML table from a list of dicts (or one dict shown as name/value rows)."""
    if isinstance(rows, dict):
        rows = [{"name": k, "value": v} for k, v in rows.items()]
    rows = list(rows)
    if not rows:
        return "<p class='note'>(no rows)</p>"
    if columns is None:
        columns = []
        for r in rows:
            columns += [c for c in r if c not in columns]
    out = ["<table><thead><tr>", *(f"<th>{esc(c)}</th>" for c in columns), "</tr></thead><tbody>"]
    for r in rows:
        out.append("<tr>")
        for c in columns:
            v = r.get(c)
            num = isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool)
            out.append(f"<td class='num'>{esc(_fmt(v))}</td>" if num else f"<td>{esc(_fmt(v))}</td>")
        out.append("</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def figure_png(fig) -> bytes:
    """PNG bytes of a matplotlib figure (Agg; no timestamp metadata, so bytes are reproducible)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight", metadata={"Software": None})
    return buf.getvalue()


def versions() -> dict:
    """Versions of surfacekit and its main dependencies, for provenance."""
    from importlib import metadata

    from ..version import __version__

    out = {"surfacekit": __version__, "python": platform.python_version()}
    for name in ("numpy", "scipy", "trimesh", "matplotlib", "plotly", "nibabel"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    out["platform"] = platform.platform(terse=True)
    return out


def _css() -> str:
    return resources.files("surfacekit.app").joinpath("report_assets/report.css").read_text("utf-8")


_JS = """
(function () {
  var specs = JSON.parse(document.getElementById('sk-panels').textContent);
  var done = 0;
  specs.forEach(function (spec) {
    var div = document.getElementById(spec.div);
    Plotly.newPlot(div, spec.figure.data, spec.figure.layout,
                   {responsive: true, displaylogo: false}).then(function () {
      done += 1; document.body.setAttribute('data-sk-rendered', String(done));
    });
    var sel = document.getElementById(spec.div + '-select');
    var desc = document.getElementById(spec.div + '-desc');
    sel.addEventListener('change', function () {
      var layer = spec.layers[Number(sel.value)];
      Plotly.restyle(div, layer.update, layer.traces);
      desc.textContent = layer.description;
    });
  });
})();
"""


def write_report(path, *, title: str, panels: Sequence[ReportPanel] = (),
                 summary: dict | None = None, tables: dict[str, Sequence[dict]] | None = None,
                 figures: dict[str, Any] | None = None, provenance: dict | None = None,
                 figure_dir=None, subtitle: str = "") -> Path:
    """Write a single-file HTML report (no network needed to view it).

    Parameters
    ----------
    path : output ``.html`` path (written atomically)
    title, subtitle : page heading (escaped)
    panels : interactive 3D views (:class:`ReportPanel`)
    summary : headline numbers, shown as a name/value table
    tables : ``{caption: rows}`` with rows a list of dicts
    figures : ``{caption: matplotlib Figure or PNG bytes}``; embedded as base64 and,
        when ``figure_dir`` is given, also written there as ``<slug>.png`` for print
    provenance : ``{"inputs": ..., "options": ..., "timings": ...}``; package
        versions and the creation time are added

    Returns
    -------
    Path of the written report.
    """
    path = Path(path)
    page = _Page()
    page.add("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
             "<meta name='viewport' content='width=device-width, initial-scale=1'>"
             f"<title>{esc(title)}</title><style>{_css()}</style></head><body>")
    page.add(f"<header><h1>{esc(title)}</h1><div class='sub'>{esc(subtitle)}</div></header><main>")
    page.add(f"<div class='caution' role='note'>{esc(CAUTION)}</div>")
    if summary:
        page.add(f"<section><h2>Summary</h2>{html_table(summary)}</section>")
    specs = []
    if panels:
        page.add("<section><h2>Surfaces</h2>")
        for n, panel in enumerate(panels):
            div_id = f"sk-panel-{n}"
            spec = _panel_spec(panel, div_id)
            specs.append(spec)
            options = "".join(f"<option value='{i}'>{esc(layer.name)}</option>"
                              for i, layer in enumerate(panel.layers))
            page.add(f"<div class='panel'><h3>{esc(panel.title)}</h3><div class='controls'>"
                     f"<label for='{div_id}-select'>Field shown:</label>"
                     f"<select id='{div_id}-select'>{options}</select>"
                     f"<span class='note' id='{div_id}-desc'>{esc(panel.layers[0].description)}</span>"
                     f"</div><div class='plot3d' id='{div_id}'></div>"
                     f"<div class='note'>{esc(panel.note)}</div></div>")
        page.add("</section>")
    for caption, rows in (tables or {}).items():
        page.add(f"<section><h2>{esc(caption)}</h2>{html_table(rows)}</section>")
    if figures:
        page.add("<section><h2>Figures</h2>")
        if figure_dir is not None:
            Path(figure_dir).mkdir(parents=True, exist_ok=True)
        for caption, fig in figures.items():
            png = fig if isinstance(fig, (bytes, bytearray)) else figure_png(fig)
            if figure_dir is not None:
                target = Path(figure_dir) / f"{slug(caption)}.png"
                with atomic_path(target) as tmp:
                    tmp.write_bytes(png)
            data = base64.b64encode(png).decode("ascii")
            page.add(f"<figure><img alt='{esc(caption)}' src='data:image/png;base64,{data}'>"
                     f"<figcaption>{esc(caption)}</figcaption></figure>")
        page.add("</section>")
    prov = dict(provenance or {})
    prov.setdefault("created", datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC"))
    page.add("<section><h2>Provenance</h2>")
    for key, value in prov.items():
        if isinstance(value, dict) or (isinstance(value, list) and value and isinstance(value[0], dict)):
            page.add(f"<h3>{esc(key)}</h3>{html_table(value)}")
        else:
            page.add(f"<p><b>{esc(key)}:</b> {esc(_fmt(value))}</p>")
    page.add(f"<h3>versions</h3>{html_table(versions())}</section>")
    page.add(f"</main><footer>{esc(CAUTION)} Made with surfacekit.</footer>")
    if specs:
        import plotly.offline

        page.add(f"<script type='application/json' id='sk-panels'>{_script_json(specs)}</script>")
        page.add(f"<script>{plotly.offline.get_plotlyjs()}</script><script>{_JS}</script>")
    page.add("</body></html>")
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(path) as tmp:
        tmp.write_text("".join(page.parts), encoding="utf-8")
    return path
