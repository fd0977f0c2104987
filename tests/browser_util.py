"""Open an HTML report in headless Chromium (Debian's package) through Playwright.

Used by tests/test_browser.py and docs/make_report_screenshot.py.  No browser is
downloaded: Playwright drives the system ``chromium`` binary.  WebGL runs on
SwiftShader (software rendering), as there is no GPU.
"""
from __future__ import annotations

import shutil
from pathlib import Path

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run",
         "--use-gl=angle", "--use-angle=swiftshader", "--enable-unsafe-swiftshader"]


def chromium_path() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return None


def why_no_browser() -> str | None:
    """None when a browser test can run, else the reason it cannot."""
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        return "python package 'playwright' is not installed (pip install -e '.[test]')"
    if chromium_path() is None:
        return "no chromium binary on PATH (Debian: apt-get install chromium)"
    return None


def render(html_path: Path, screenshot: Path | None = None, *, width: int = 1280,
           height: int = 1800, select: tuple[str, int] | None = None) -> dict:
    """Load a report, wait for its 3D views, and collect what a person would see.

    Returns ``{"console": [(type, text)], "page_errors": [...], "requests": [...],
    "rendered": int, "canvas_png": bytes, "page_png": bytes}``; ``requests`` lists
    every URL the page asked for other than the file itself (should be none);
    ``dialogs`` any alert/confirm the page raised; with ``select=(panel id, option)``
    also ``canvas_png_after_select``.
    """
    from playwright.sync_api import sync_playwright

    out: dict = {"console": [], "page_errors": [], "requests": [], "dialogs": []}
    url = Path(html_path).resolve().as_uri()
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=chromium_path(), args=FLAGS)
        try:
            page = browser.new_page(viewport={"width": width, "height": height})
            page.on("console", lambda m: out["console"].append((m.type, m.text)))
            page.on("pageerror", lambda e: out["page_errors"].append(str(e)))
            page.on("dialog", lambda d: (out["dialogs"].append(d.message), d.dismiss()))

            def _route(route):
                if route.request.url != url:
                    out["requests"].append(route.request.url)
                    return route.abort()
                return route.continue_()

            page.route("**/*", _route)
            page.goto(url, wait_until="load", timeout=120_000)
            page.wait_for_function("document.body.getAttribute('data-sk-rendered') !== null",
                                   timeout=120_000)
            page.wait_for_timeout(1500)
            out["rendered"] = int(page.get_attribute("body", "data-sk-rendered") or 0)
            plot = page.locator(".plot3d").first
            plot.scroll_into_view_if_needed()
            out["canvas_png"] = plot.screenshot()
            if select is not None:  # switch the field shown and look again
                page.select_option(f"#{select[0]}-select", str(select[1]))
                page.wait_for_timeout(1500)
                out["canvas_png_after_select"] = plot.screenshot()
            out["page_png"] = page.screenshot(full_page=False)
            if screenshot is not None:
                Path(screenshot).write_bytes(out["page_png"])
        finally:
            browser.close()
    return out


def painted(png: bytes, width_fraction: float = 0.75) -> tuple[float, int]:
    """How much of a 3D view's picture is painted by the mesh.

    Looks only at the left `width_fraction` of the picture (the colour bar, drawn
    as SVG on the right, must not count) and returns (fraction of pixels that
    are not the white background, number of distinct colours there).
    """
    import io

    import numpy as np
    from matplotlib import image

    img = image.imread(io.BytesIO(png), format="png")[..., :3]
    img = img[:, : int(img.shape[1] * width_fraction)]
    flat = np.round(img.reshape(-1, 3) * 255).astype(int)
    not_white = (255 - flat).max(axis=1) > 30
    return float(not_white.mean()), len(np.unique(flat @ np.array([65536, 256, 1])))


def inspect_layout(html_path: Path, *, width: int = 1280, narrow: int = 900) -> dict:
    """Page width, section titles, and every field's caption and colour-bar title after
    choosing it in the menu, for a report opened at a `width` px window.

    Returns ``{"scroll_width": int, "titles": [...], "fields": {panel id: [(option,
    caption, colour-bar title), ...]}, "narrow": {"scroll_width": int, "plots": [(plot
    width, box width), ...]}}``; ``narrow`` is measured after resizing the window to
    `narrow` px (3D views must shrink with it).
    """
    from playwright.sync_api import sync_playwright

    out: dict = {"fields": {}}
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=chromium_path(), args=FLAGS)
        try:
            page = browser.new_page(viewport={"width": width, "height": 1000})
            page.goto(Path(html_path).resolve().as_uri(), wait_until="load", timeout=120_000)
            page.wait_for_function("document.body.getAttribute('data-sk-rendered') !== null",
                                   timeout=120_000)
            page.wait_for_timeout(1000)
            out["scroll_width"] = page.evaluate("document.documentElement.scrollWidth")
            out["titles"] = page.evaluate(
                "Array.from(document.querySelectorAll('h2')).map(e => e.textContent)")
            for sel in page.locator("select[id$='-select']").all():
                panel = sel.get_attribute("id")[: -len("-select")]
                seen = []
                for value in sel.evaluate("s => Array.from(s.options).map(o => o.value)"):
                    sel.select_option(value)
                    page.wait_for_timeout(300)
                    seen.append((value, page.inner_text(f"#{panel}-desc"), page.evaluate(
                        f"Array.from(document.querySelectorAll('#{panel} .cbtitle'))"
                        ".map(e => e.textContent).join(' | ')")))
                out["fields"][panel] = seen
            page.set_viewport_size({"width": narrow, "height": 1000})
            page.wait_for_timeout(1500)
            out["narrow"] = {
                "scroll_width": page.evaluate("document.documentElement.scrollWidth"),
                "plots": page.evaluate(
                    "Array.from(document.querySelectorAll('.plot3d')).map(d => "
                    "[d.querySelector('.main-svg').getBoundingClientRect().width, "
                    "d.getBoundingClientRect().width])")}
        finally:
            browser.close()
    return out
