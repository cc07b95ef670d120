"""The explorer in a real browser: Voila + Debian chromium (one server, one page).

Order matters (one page for the whole module): render, brush, canvas, exclusion,
console.
"""

from __future__ import annotations

import io
import time

import numpy as np
import pytest

from .conftest import unexpected

pytestmark = [pytest.mark.browser, pytest.mark.slow]

VIEWS = {
    "map view": ".ensemblelab-map",
    "delay cut": ".ensemblelab-delay-cut",
    "energy cut": ".ensemblelab-energy-cut",
    "structure view": ".ensemblelab-ngl canvas",
    "structure caption": ".ensemblelab-structure-caption",
    "selection table": ".ensemblelab-selection-summary",
    "population view": ".ensemblelab-populations",
    "trajectory view": ".ensemblelab-trajectory-info",
    "quality view": ".ensemblelab-quality-summary",
    "export": ".ensemblelab-export-tables-csv",
    "messages": ".ensemblelab-messages",
}


def _wait_text_change(page, selector: str, before: str, timeout: float = 30.0) -> float:
    start = time.monotonic()
    while time.monotonic() - start < timeout:
        if page.locator(selector).first.inner_text() != before:
            return time.monotonic() - start
        page.wait_for_timeout(25)
    raise AssertionError(f"{selector} did not change within {timeout} s")


def test_browser_page_renders_every_view(browser_page, explore_server):
    page = browser_page
    missing = [name for name, sel in VIEWS.items() if page.locator(sel).count() == 0]
    assert not missing, f"views not rendered: {missing}"
    assert "error" not in page.locator(".ensemblelab-messages").inner_text().lower()
    url, t_url = explore_server
    print(f"\nexplore printed {url} after {t_url:.1f} s; page rendered in "
          f"{page.render_seconds:.1f} s")


def test_browser_brush_updates_table_and_caption(browser_page):
    page = browser_page
    box = page.locator(".ensemblelab-map .plotarea_background").bounding_box()
    summary = ".ensemblelab-selection-summary"
    caption = ".ensemblelab-structure-caption"
    before_summary = page.locator(summary).inner_text()
    before_caption = page.locator(caption).inner_text()
    x0, x1 = box["x"] + 0.05 * box["width"], box["x"] + 0.6 * box["width"]
    y0, y1 = box["y"] + 0.2 * box["height"], box["y"] + 0.8 * box["height"]
    page.mouse.move(x0, y0)
    page.mouse.down()
    page.mouse.move(0.5 * (x0 + x1), 0.5 * (y0 + y1), steps=5)
    page.mouse.move(x1, y1, steps=5)
    page.mouse.up()
    round_trip = _wait_text_change(page, summary, before_summary)
    _wait_text_change(page, caption, before_caption)
    text = page.locator(summary).inner_text()
    assert "contributing snapshots" in text, text
    rows = page.locator(".ensemblelab-selection-rows option").all_inner_texts()
    assert rows and "%" in rows[0]
    cap = page.locator(caption).inner_text()
    assert "trajectory" in cap and "share" in cap
    print(f"\nbrowser round trip brush -> selection table updated: {1e3 * round_trip:.0f} ms "
          "(printed, not asserted)")


def test_browser_ngl_canvas_is_drawn(browser_page):
    import matplotlib.image as mpimg

    page = browser_page
    page.wait_for_timeout(1500)  # let NGL finish the new structure
    png = page.locator(".ensemblelab-ngl canvas").first.screenshot()
    rgb = mpimg.imread(io.BytesIO(png), format="png")[..., :3]
    background = rgb[0, 0]
    drawn = np.any(np.abs(rgb - background) > 0.1, axis=-1).mean()
    assert drawn > 0.002, f"NGL canvas looks blank ({100 * drawn:.3f} % drawn pixels)"


def test_browser_excluding_a_flagged_trajectory_changes_the_map(browser_page):
    page = browser_page
    page.locator(".lm-TabBar-tab", has_text="quality").first.click()
    select = page.locator(".ensemblelab-quality-rows select")
    start = time.monotonic()  # the flags are computed in the background after rendering
    while select.locator("option").count() == 0 and time.monotonic() - start < 120:
        page.wait_for_timeout(100)
    assert select.locator("option").count() > 0, "no flagged trajectories listed"
    image = page.locator(".ensemblelab-map image").first
    before = image.get_attribute("href") or image.get_attribute("xlink:href")
    n_excluded = ".ensemblelab-n-excluded"
    assert page.locator(n_excluded).inner_text() == "0"
    select.select_option(index=0)
    page.locator("button.ensemblelab-quality-exclude").click()
    _wait_text_change(page, n_excluded, "0")
    assert page.locator(n_excluded).inner_text() == "1"
    start = time.monotonic()
    while time.monotonic() - start < 60:
        after = image.get_attribute("href") or image.get_attribute("xlink:href")
        if after != before:
            break
        page.wait_for_timeout(100)
    else:
        raise AssertionError("the map did not change after excluding a trajectory")


def test_browser_console_has_no_unexpected_errors(browser_page):
    assert "error" not in browser_page.locator(".ensemblelab-messages").inner_text().lower()
    errs = unexpected(browser_page.errors)
    assert errs == [], "\n".join(errs)


def test_browser_server_refuses_requests_without_its_token(explore_server):
    import http.client
    import urllib.parse

    url, _ = explore_server
    parts = urllib.parse.urlparse(url)
    assert parts.query.startswith("token=")  # the printed URL carries the token
    for path in ("/", "/?token=wrong"):
        conn = http.client.HTTPConnection("127.0.0.1", parts.port, timeout=60)
        conn.request("GET", path)
        resp = conn.getresponse()
        body = resp.read()
        conn.close()
        # expected: no page without the token, only the login redirect (common practice of
        # Jupyter servers: 302 to /login for a page, 403 for an API call)
        assert resp.status in (302, 403), (path, resp.status)
        assert b"ensemblelab" not in body
        if resp.status == 302:
            assert resp.getheader("Location", "").startswith("/login")
