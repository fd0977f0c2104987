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
from ..io.tables import RESEARCH_NOTE
from .panels import ReportLayer, ReportPanel, esc, panel_spec

__all__ = ["ReportLayer", "ReportPanel", "esc", "figure_png", "html_table", "slug", "versions",
           "write_report"]


@dataclass
class _Page:
    parts: list[str] = field(default_factory=list)

    def add(self, text: str) -> None:
        self.parts.append(text)


def _script_json(obj: Any) -> str:
    text = json.dumps(obj, separators=(",", ":"), allow_nan=False)
    return text.replace("<", "\\u003c").replace(">", "\\u003e").replace("&", "\\u0026")


def slug(text: str) -> str:
    """A file-name-safe version of a caption."""
    s = re.sub(r"[^A-Za-z0-9]+", "_", text).strip("_").lower()
    return s[:60] or "figure"


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


def figure_png(fig, *, close: bool = False) -> bytes:
    """PNG bytes of a matplotlib figure (Agg; no timestamp metadata, so bytes are reproducible).

    With `close`, the figure is released from pyplot afterwards (pyplot keeps every open figure
    alive, so a long session of reports would otherwise grow without bound)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight", metadata={"Software": None})
    if close:
        import matplotlib.pyplot as plt

        plt.close(fig)
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
                 figure_dir=None, subtitle: str = "", warnings: Sequence[str] = ()) -> Path:
    """Write a single-file HTML report (no network needed to view it).

    Parameters
    ----------
    path : output ``.html`` path (written atomically)
    title, subtitle : page heading (escaped)
    panels : interactive 3D views (:class:`ReportPanel`)
    summary : headline numbers, shown as a name/value table
    warnings : plain sentences shown in a box at the top (implausible sizes, mixed
        units, a large alignment residual: see :mod:`surfacekit.analysis.plausibility`)
    tables : ``{caption: rows}`` with rows a list of dicts
    figures : ``{caption: matplotlib Figure or PNG bytes}``; embedded as base64 and, when
        ``figure_dir`` is given, also written there as ``<slug>.png`` for print; figures are
        closed once drawn
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
    page.add(f"<div class='caution' role='note'>{esc(RESEARCH_NOTE)}</div>")
    if warnings:
        items = "".join(f"<li>{esc(w)}</li>" for w in warnings)
        page.add(f"<section class='warnings' id='sk-warnings' role='alert'><h2>Warnings "
                 f"({len(warnings)})</h2><ul>{items}</ul></section>")
    if summary:
        page.add(f"<section><h2>Summary</h2>{html_table(summary)}</section>")
    specs = []
    if panels:
        page.add("<section><h2>Surfaces</h2>")
        for n, panel in enumerate(panels):
            div_id = f"sk-panel-{n}"
            spec = panel_spec(panel, div_id)
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
            png = fig if isinstance(fig, (bytes, bytearray)) else figure_png(fig, close=True)
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
    page.add(f"</main><footer>{esc(RESEARCH_NOTE)} Made with surfacekit.</footer>")
    if specs:
        import plotly.offline

        page.add(f"<script type='application/json' id='sk-panels'>{_script_json(specs)}</script>")
        page.add(f"<script>{plotly.offline.get_plotlyjs()}</script><script>{_JS}</script>")
    page.add("</body></html>")
    path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_path(path) as tmp:
        tmp.write_text("".join(page.parts), encoding="utf-8")
    return path
