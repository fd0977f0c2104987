"""Screenshot of a surfacekit report for the README (headless chromium via Playwright).

Usage: python docs/make_report_screenshot.py surfacekit-demo/report.html docs/report.png
"""
from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "tests"))
from browser_util import render, why_no_browser


def main(report: str, png: str) -> None:
    reason = why_no_browser()
    if reason:
        raise SystemExit(f"cannot take a screenshot: {reason}")
    seen = render(Path(report), width=1200, height=1500)
    Path(png).write_bytes(seen["page_png"])
    print(f"wrote {png}; console errors: "
          f"{[t for k, t in seen['console'] if k == 'error'] or 'none'}")


if __name__ == "__main__":
    main(*sys.argv[1:3])
