"""The demo report and a change report fit the window, in a real headless browser.

Measured as a reader sees them: no page wider than a 1280 px window (tables
transposed or in their own scroll box), unique section titles, and under each
3D view the caption and colour bar of the field chosen in the menu (a diverging
zero-centred scale only for signed fields).  3D views shrink with the window.
"""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
from browser_util import inspect_layout, why_no_browser

pytestmark = [pytest.mark.browser, pytest.mark.slow,  # small demo + browser: ~40 s
              pytest.mark.skipif(why_no_browser() is not None, reason=str(why_no_browser()))]

WIDTH = 1280


def _command() -> list[str]:
    exe = Path(sys.executable).with_name("surfacekit")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "surfacekit.app.cli"]


@pytest.fixture(scope="module")
def reports(tmp_path_factory):
    """The small demo's report and a `change` report on the demo's meshes."""
    root = tmp_path_factory.mktemp("layout")
    demo, data = root / "demo", root / "demo" / "data"
    for argv in (["demo", "--size", "small", "-o", demo, "-q"],
                 ["change", data / "kidney_baseline.ply", data / "kidney_followup.ply",
                  "--regions", data / "kidney_template.ply", "-o", root / "change", "-q"]):
        run = subprocess.run(_command() + [str(a) for a in argv], capture_output=True, text=True,
                             check=False, timeout=600)
        assert run.returncode == 0, run.stderr[-2000:]
    return {"demo": demo / "report.html", "change": root / "change" / "report.html"}


@pytest.mark.parametrize("which", ["demo", "change"])
def test_report_fits_the_window_and_captions_follow_the_field(reports, which):
    seen = inspect_layout(reports[which], width=WIDTH, narrow=900)
    assert seen["scroll_width"] <= WIDTH, seen["scroll_width"]
    titles = [" ".join(t.split()).casefold() for t in seen["titles"]]
    assert len(titles) == len(set(titles)), seen["titles"]
    assert seen["fields"], "no 3D view with a field menu"
    for panel, fields in seen["fields"].items():
        captions = [caption for _, caption, _ in fields]
        assert len(set(captions)) == len(captions), (panel, captions)  # each field its own caption
        bars = [bar for _, _, bar in fields]
        assert len(set(bars)) == len(bars), (panel, bars)  # and its own colour bar
        for _, caption, bar in fields:
            diverging = "centred on zero" in caption
            assert diverging == ("displacement" in bar.lower() and "magnitude" not in bar.lower()
                                 or "area change" in bar or "distortion" in bar
                                 or "t statistic" in bar or "difference" in bar), (caption, bar)
            if "confidence" in bar:
                assert "sequential scale" in caption
            if bar.startswith("regions"):
                assert "one colour per region" in caption and "region 1" not in caption
    # the 3D views shrink with the window and the page still fits
    assert seen["narrow"]["scroll_width"] <= 900
    for plot_width, box_width in seen["narrow"]["plots"]:
        assert plot_width <= box_width + 1 and box_width < 900
