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
from datetime import UTC, datetime
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np

from ..io.files import atomic_path
from ..io.tables import RESEARCH_NOTE
from .panels import ReportLayer, ReportPanel, esc, panel_spec
from .report_labels import readable

__all__ = ["ReportLayer", "ReportPanel", "esc", "figure_png", "html_table", "readable", "slug",
           "versions", "write_report"]


@dataclass
class _Page:
    parts: list[str] = field(default_factory=list)
    titles: set[str] = field(default_factory=set)

    def add(self, text: str) -> None:
        self.parts.append(text)

    def title(self, text: str) -> str:
        """A section title not used before on this page (a repeat gets " (2)", " (3)", ...)."""
        text = " ".join(str(text).split())
        unique, n = text, 1
        while unique.casefold() in self.titles:
            n += 1
            unique = f"{text} ({n})"
        self.titles.add(unique.casefold())
        return unique


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


def _label_column(rows: list[dict], columns: Sequence[str]) -> str | None:
    """The first column holding a text name in every row (used as header when transposed)."""
    for c in columns:
        if all(isinstance(r.get(c), str) for r in rows):
            return c
    return None


def _cell(v: Any) -> str:
    num = isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_))
    return f"<td class='num'>{esc(_fmt(v))}</td>" if num else f"<td>{esc(_fmt(v))}</td>"


def html_table(rows: Sequence[dict] | dict, *, columns: Sequence[str] | None = None,
               max_columns: int = 8, words: bool = True) -> str:
    """An escaped HTML table from a list of dicts (or one dict shown as name/value rows).

    Headers (and the names of a name/value table) are shown in words with units
    (:func:`surfacekit.app.report_labels.readable`).  A table with more than
    `max_columns` columns and fewer rows than columns is transposed: one row per
    measure, one column per record (named by its first text column).  Every table
    sits in its own horizontally scrolling box, so the page never grows wider
    than the window.  With ``words=False`` names are shown exactly as given (provenance:
    the record of options and inputs as the user typed them).
    """
    name = readable if words else str
    if isinstance(rows, dict):
        rows = [{"name": name(k), "value": v} for k, v in rows.items()]
    rows = list(rows)
    if not rows:
        return "<p class='note'>(no rows)</p>"
    if columns is None:
        columns = []
        for r in rows:
            columns += [c for c in r if c not in columns]
    head = _label_column(rows, columns)
    if len(columns) > max_columns and len(rows) < len(columns):
        names = ([r.get(head) for r in rows] if head else
                 ["Value"] if len(rows) == 1 else [f"#{i + 1}" for i in range(len(rows))])
        out = ["<table class='transposed'><thead><tr>",
               f"<th>{esc(name(head) if head else 'Measure')}</th>",
               *(f"<th>{esc(_fmt(n))}</th>" for n in names), "</tr></thead><tbody>"]
        for c in columns:
            if c != head:
                out += [f"<tr><th scope='row'>{esc(name(c))}</th>",
                        *(_cell(r.get(c)) for r in rows), "</tr>"]
    else:
        out = ["<table><thead><tr>", *(f"<th>{esc(name(c))}</th>" for c in columns),
               "</tr></thead><tbody>"]
        for r in rows:
            out += ["<tr>", *(_cell(r.get(c)) for c in columns), "</tr>"]
    out.append("</tbody></table>")
    return "<div class='table-wrap'>" + "".join(out) + "</div>"


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
      Plotly.Plots.resize(div);
      done += 1; document.body.setAttribute('data-sk-rendered', String(done));
    });
    var sel = document.getElementById(spec.div + '-select');
    var desc = document.getElementById(spec.div + '-desc');
    sel.addEventListener('change', function () {
      var layer = spec.layers[Number(sel.value)];
      Plotly.restyle(div, layer.update, layer.traces);
      desc.textContent = layer.caption;
    });
  });
})();
"""


def _panel_html(panel: ReportPanel, spec: dict) -> str:
    """The heading, field menu, per-field caption and plot box of one 3D view."""
    div_id = spec["div"]
    options = "".join(f"<option value='{i}'>{esc(layer.name)}</option>"
                      for i, layer in enumerate(panel.layers))
    note = f"<div class='note'>{esc(panel.note)}</div>" if panel.note else ""
    return (f"<div class='panel'><h3>{esc(panel.title)}</h3><div class='controls'>"
            f"<label for='{div_id}-select'>Field shown:</label>"
            f"<select id='{div_id}-select'>{options}</select></div>"
            f"<p class='caption' id='{div_id}-desc' aria-live='polite'>"
            f"{esc(spec['layers'][0]['caption'])}</p>"
            f"<div class='plot3d' id='{div_id}'></div>{note}</div>")


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
        page.add(f"<section><h2>{esc(page.title('Summary'))}</h2>{html_table(summary)}</section>")
    specs = []
    if panels:
        page.add(f"<section><h2>{esc(page.title('Interactive 3D views'))}</h2>")
        for n, panel in enumerate(panels):
            specs.append(panel_spec(panel, f"sk-panel-{n}"))
            page.add(_panel_html(panel, specs[-1]))
        page.add("</section>")
    for caption, rows in (tables or {}).items():
        page.add(f"<section><h2>{esc(page.title(caption))}</h2>{html_table(rows)}</section>")
    if figures:
        page.add(f"<section><h2>{esc(page.title('Figures'))}</h2><div class='figures'>")
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
        page.add("</div></section>")
    prov = dict(provenance or {})
    prov.setdefault("created", datetime.now(UTC).strftime("%Y-%m-%d %H:%M:%S UTC"))
    page.add(f"<section><h2>{esc(page.title('Provenance'))}</h2>")
    for key, value in prov.items():
        if isinstance(value, dict) or (isinstance(value, list) and value and isinstance(value[0], dict)):
            page.add(f"<h3>{esc(key)}</h3>{html_table(value, words=False)}")
        else:
            page.add(f"<p><b>{esc(key)}:</b> {esc(_fmt(value))}</p>")
    page.add(f"<h3>versions</h3>{html_table(versions(), words=False)}</section>")
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
