"""The HTML report in a real headless browser (Debian's chromium, driven by Playwright).

Checks what a person would see: every 3D view renders a non-blank WebGL picture,
switching the field menu changes the picture, the console shows no errors, the
page asks for nothing over the network, and an escaped malicious file name never
runs.  Skips, with the reason, only where no chromium or playwright can be had.
"""
from __future__ import annotations

import numpy as np
import pytest
from browser_util import painted, render, why_no_browser

import surfacekit as sk
from surfacekit.app.report import ReportLayer, ReportPanel, write_report
from surfacekit.app.views import correspondence_panel

pytestmark = [pytest.mark.browser, pytest.mark.slow,  # a browser start: ~10 s
              pytest.mark.skipif(why_no_browser() is not None, reason=str(why_no_browser()))]

EVIL = "<script>alert(1)</script>.ply"


class _IdentityMap:
    """A correspondence between two triangulations of the same synthetic shape (ground truth)."""

    def __init__(self, s2t, t2s, confidence):
        self.source_to_target, self.target_to_source = s2t, t2s
        self.confidence, self.source_confidence = confidence, None

    def transfer(self, values):
        return np.asarray(values)[self.target_to_source]


@pytest.fixture(scope="module")
def report_path(tmp_path_factory):
    from scipy.spatial import cKDTree

    a, sa = sk.synthetic.organ_surface("kidney", 1500, seed=1)
    b, sb = sk.synthetic.organ_surface("kidney", 1800, seed=2)
    corr = _IdentityMap(cKDTree(sb).query(sa)[1], cKDTree(sa).query(sb)[1],
                        np.linspace(0, 1, b.n_vertices))
    change = np.exp(-np.sum((sa - [0.6, -0.7, 0.3]) ** 2, axis=1) / 0.2) * 4.0 - 0.5
    panels = [
        ReportPanel("Change " + EVIL, [(EVIL, a), ("follow-up", b)], [
            ReportLayer("normal displacement", [change, corr.transfer(change)], kind="diverging",
                        unit="mm"),
            ReportLayer("regions", [(sa[:, 0] > 0).astype(int) + 1, None], kind="labels")]),
        correspondence_panel("baseline", a, "follow-up", b, corr),
    ]
    path = tmp_path_factory.mktemp("browser") / "report.html"
    return write_report(path, title="browser test " + EVIL, panels=panels,
                        summary={"subject": EVIL}, provenance={"inputs": [{"file": EVIL}]})


def test_report_renders_in_headless_chromium(report_path, tmp_path):
    seen = render(report_path, tmp_path / "page.png", select=("sk-panel-0", 1))
    errors = [text for kind, text in seen["console"] if kind == "error"]
    assert errors == [], errors
    assert seen["page_errors"] == []
    assert seen["requests"] == []  # fully offline: plotly.js is inline
    assert seen["dialogs"] == []  # the escaped <script> in names never ran
    assert seen["rendered"] == 2  # both 3D views finished plotting
    # WebGL painted a shaded, coloured mesh: a blank canvas is white apart from two text labels
    fraction, colours = painted(seen["canvas_png"])
    assert fraction > 0.05 and colours > 1000, (fraction, colours)
    assert seen["canvas_png_after_select"] != seen["canvas_png"]  # the field menu restyles the view
