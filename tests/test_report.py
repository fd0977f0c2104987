"""The HTML report: self-contained, escaped, colour scales, figures, map distortion.

The in-browser rendering is checked in tests/test_browser.py.
"""
from __future__ import annotations

import json
import re
from html import escape as html_escape

import numpy as np
import pytest

import surfacekit as sk
from surfacekit.app import figures as report_figures
from surfacekit.app import panels
from surfacekit.app.report import ReportLayer, ReportPanel, write_report
from surfacekit.app.views import colour_fields, map_distortion

EVIL = "<script>alert(1)</script>.ply"


@pytest.fixture(scope="module")
def kidney():
    return sk.synthetic.organ_surface("kidney", 500, seed=2)[0]


def _panel_json(html: str) -> list:
    m = re.search(r"<script type='application/json' id='sk-panels'>(.*?)</script>", html, re.DOTALL)
    return json.loads(m.group(1))


def test_report_is_self_contained_and_escaped(tmp_path, kidney):
    """A user name like <script>alert(1)</script>.ply is shown as text and never runs."""
    x = kidney.vertices[:, 0]
    panel = ReportPanel(EVIL, [(EVIL, kidney)],
                        [ReportLayer(EVIL, [x], kind="diverging", unit="mm", description=EVIL)],
                        note=EVIL)
    path = write_report(tmp_path / "r.html", title=EVIL, subtitle=EVIL, panels=[panel],
                        summary={EVIL: EVIL}, tables={EVIL: [{EVIL: EVIL, "n": 3}]},
                        provenance={"inputs": [{"file": EVIL}], "options": {"label": EVIL}})
    html = path.read_text()
    assert "alert(1)" in html
    assert "<script>alert(1)" not in html  # only ever escaped
    assert "&lt;script&gt;alert(1)&lt;/script&gt;.ply" in html
    # the only <script> elements are the JSON blob, plotly.js and our own loader
    assert html.count("<script") == 3
    specs = _panel_json(html)  # parses: the JSON blob survived the escaping
    assert specs[0]["figure"]["data"][0]["name"].startswith("&lt;script&gt;")
    # no external resources: nothing is loaded from a network
    assert not re.search(r"""<(script|link|img)[^>]+(src|href)=['"]?(https?:)?//""", html)
    assert sk.io.RESEARCH_NOTE in html  # the package's one research-use caution


def test_diverging_scale_is_centred_on_zero_and_layers_switch(tmp_path, kidney):
    """Change maps: symmetric limits put zero in the middle of the diverging scale."""
    nd = kidney.vertices[:, 0] * 0.1 + 2.0  # mostly positive values
    conf = np.linspace(0, 1, kidney.n_vertices)
    labels = (kidney.vertices[:, 0] > 0).astype(int) + 1
    panel = ReportPanel("p", [("a", kidney), ("b", kidney)], [
        ReportLayer("change", [nd, None], kind="diverging", unit="mm"),
        ReportLayer("confidence", [conf, conf], kind="sequential", limits=(0, 1)),
        ReportLayer("regions", [labels, labels], kind="labels", label_names={1: "left", 2: "right"}),
    ])
    html = write_report(tmp_path / "r.html", title="t", panels=[panel]).read_text()
    spec = _panel_json(html)[0]
    change = spec["layers"][0]["update"]
    assert change["cmin"][0] == -change["cmax"][0] > -1e9
    assert change["cmax"][0] >= np.percentile(np.abs(nd), 99) - 1e-9
    assert change["showscale"] == [True, False]  # one colour bar
    assert change["colorscale"][1] == panels.NEUTRAL  # field not defined on the second surface
    assert spec["layers"][1]["update"]["cmin"] == [0.0, 0.0]
    regions = spec["layers"][2]["update"]
    assert regions["colorbar.ticktext"][0] == ["left", "right"]
    assert regions["intensitymode"] == ["cell", "cell"]  # flat colour per triangle
    assert len(regions["intensity"][0]) == kidney.n_faces
    assert set(regions["intensity"][0]) == {0, 1}  # band index of each region present
    assert regions["cmin"][0] == -0.5 and regions["cmax"][0] == 1.5  # one band per region
    # each field carries the caption of its own colour scale
    captions = [layer["caption"] for layer in spec["layers"]]
    assert "centred on zero" in captions[0] and "Not defined on b" in captions[0]
    assert "sequential scale from 0 (light) to 1 (dark)" in captions[1]
    assert "centred on zero" not in captions[1] + captions[2]
    assert "one colour per region (left, right)" in captions[2]
    assert f"id='sk-panel-0-desc' aria-live='polite'>{html_escape(captions[0])}<" in html
    assert len(spec["figure"]["data"][0]["intensity"]) == kidney.n_vertices
    assert "sk-panel-0-select" in html and html.count("<option") == 3


def test_tables_fit_and_headers_read_as_words(tmp_path):
    """Wide tables are transposed, headers are words with units, section titles are unique."""
    from surfacekit.app.report import readable

    assert readable("mean_abs_normal_displacement_mm") == "Mean |normal displacement| (mm)"
    assert readable("area_mm2") == "Area (mm²)"
    assert readable("n_components") == "Number of components"
    assert readable("volume_change_followup_minus_baseline_percent") == "Volume change, follow-up − baseline (%)"
    assert readable("mean_normal_displacement_outward_mm") == "Mean normal displacement, + outward (mm)"
    assert readable("mean_log_area_ratio_followup_over_baseline") == "Mean log area ratio, follow-up / baseline"
    assert readable("some_new_key") == "Some new key"  # unknown keys: a readable fallback
    assert readable("true volume (ml)") == "true volume (ml)"  # already written for people
    wide = [{"surface": f"s{i}", **{f"measure_{j}_mm": float(j) for j in range(30)}}
            for i in range(3)]
    html = write_report(tmp_path / "r.html", title="t", tables={"Summary": wide, "Surfaces": [],
                                                                 "Surfaces ": wide[:1]},
                        summary={"volume_ml": 1.0}).read_text()
    body = html.split("<table class='transposed'>", 1)[1].split("</table>", 1)[0]
    assert body.count("<tr>") == 31  # header row + one row per measure
    assert "<th>s0</th><th>s1</th><th>s2</th>" in body
    assert "Measure 7 (mm)" in body and "measure_7_mm" not in html
    assert "Volume (ml)" in html
    titles = re.findall(r"<h2>(.*?)</h2>", html)
    assert len(titles) == len({t.casefold().strip() for t in titles}), titles
    assert "Summary (2)" in titles
    assert html.count("<div class='table-wrap'>") == 4  # every table scrolls in its own box


def test_bad_layers_are_refused(tmp_path, kidney):
    with pytest.raises(ValueError, match="values for surface"):
        write_report(tmp_path / "r.html", title="t", panels=[
            ReportPanel("p", [("a", kidney)], [ReportLayer("x", [np.zeros(3)])])])
    with pytest.raises(ValueError, match="kind"):
        write_report(tmp_path / "r.html", title="t", panels=[
            ReportPanel("p", [("a", kidney)], [ReportLayer("x", [np.zeros(500)], kind="rainbow")])])
    assert not (tmp_path / "r.html").exists()
    assert list(tmp_path.iterdir()) == []


def test_png_figures_written_and_embedded(tmp_path, kidney):
    nd = kidney.vertices[:, 2] / 10
    figs = {"Surface map": report_figures.surface_figure(kidney, nd, title="nd", kind="diverging",
                                                         unit="mm"),
            "Histogram": report_figures.histogram_figure(nd, title="nd", unit="mm",
                                                         weights=kidney.vertex_areas,
                                                         centre_zero=True),
            "Bars": report_figures.bar_figure(["a", "b"], [1.0, -2.0], title="x")}
    html = write_report(tmp_path / "r.html", title="t", figures=figs,
                        figure_dir=tmp_path / "figures").read_text()
    pngs = sorted(p.name for p in (tmp_path / "figures").glob("*.png"))
    assert pngs == ["bars.png", "histogram.png", "surface_map.png"]
    for p in (tmp_path / "figures").glob("*.png"):
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG spec, ISO 15948)
    assert html.count("data:image/png;base64,") == 3
    assert "<script" not in html  # no 3D panel, no plotly.js needed


def test_png_views_are_labelled_and_regions_get_a_legend(kidney):
    """Each PNG view names its direction; regions get one swatch per name, not a 0-9 bar.

    Camera position of a 3D view: along (cos e cos a, cos e sin a, sin e) for elevation e
    and azimuth a (matplotlib documentation, ``mpl_toolkits.mplot3d.axes3d.Axes3D.view_init``).
    """
    assert report_figures.view_name(0, 0) == "view from +x"
    assert report_figures.view_name(15, -90) == "view from −y, 15° above (+z)"
    assert report_figures.view_name(90, 0) == "view from +z"
    assert report_figures.view_name(-20, 180) == "view from −x, 20° below (−z)"
    labels = np.where(kidney.vertices[:, 0] > 0, 3, 7)
    fig = report_figures.surface_figure(kidney, labels, title="region", kind="labels",
                                        label_names={3: "left", 7: "right"})
    assert [ax.get_title() for ax in fig.axes] == ["view from −y, 15° above (+z)",
                                                   "view from +y, 15° above (+z)"]
    legend = fig.legends[0]
    assert [t.get_text() for t in legend.get_texts()] == ["left", "right"]
    assert len(fig.axes) == 2  # no colour bar axis for a categorical field
    report_figures.close(fig)
    fig = report_figures.surface_figure(kidney, kidney.vertices[:, 0], title="x", kind="diverging")
    assert len(fig.axes) == 3 and not fig.legends  # two views and one colour bar
    report_figures.close(fig)


def test_map_distortion_definition(kidney):
    """Area distortion of the map (both surfaces at unit area), per vertex in log2.

    Identity map and a map onto a scaled copy: 0 everywhere (definition).  A copy
    stretched by s along x: a face with unit normal n grows by
    sqrt(n_x² + s²(1 - n_x²)) (Nanson's relation, the cofactor of diag(s, 1, 1)),
    divided by the total area ratio after scaling to unit area.
    """
    ident = np.arange(kidney.n_vertices)
    np.testing.assert_allclose(map_distortion(kidney, kidney, ident), 0.0, atol=1e-12)
    big = kidney.copy_with(vertices=kidney.vertices * 2.0)
    np.testing.assert_allclose(map_distortion(kidney, big, ident), 0.0, atol=1e-12)
    s = 1.5
    stretched = kidney.copy_with(vertices=kidney.vertices * [s, 1.0, 1.0])
    nx = kidney.face_normals[:, 0]
    face = np.log2(np.sqrt(nx**2 + s**2 * (1 - nx**2)) * kidney.area / stretched.area)
    w = kidney.face_areas
    expected = sum(np.bincount(kidney.faces[:, c], w * face, kidney.n_vertices) for c in range(3)) / \
        sum(np.bincount(kidney.faces[:, c], w, kidney.n_vertices) for c in range(3))
    np.testing.assert_allclose(map_distortion(kidney, stretched, ident), expected, atol=1e-9)


def test_colour_fields_do_not_depend_on_pose(kidney):
    """Rigid motions change nothing intrinsic (definition); the principal-axis fields follow the shape."""
    moved = kidney.copy_with(vertices=kidney.vertices @ sk.synthetic.random_rotation(4).T + 50.0)
    a0, b0 = colour_fields(kidney)
    a1, b1 = colour_fields(moved)
    np.testing.assert_allclose(a0, a1, atol=1e-9)
    np.testing.assert_allclose(np.cos(np.radians(b0 - b1)), 1.0, atol=1e-9)
    assert a0.min() == 0.0 and a0.max() == 1.0
