"""The observable switch in a real browser: switch to scattering, brush a band, see geometries.

Voila serves ``ensemblelab explore`` on the demo data; Debian chromium is driven by
Playwright (harness in conftest.py). One page for the module; the tests run in order.
A screenshot goes to tests/e2e/screenshots/ (not committed).
"""

from __future__ import annotations

import io
import time
from pathlib import Path

import numpy as np
import pytest

from .conftest import unexpected

pytestmark = [pytest.mark.browser, pytest.mark.slow]

SCREENSHOTS = Path(__file__).resolve().parent / "screenshots"
SWITCH = ".ensemblelab-observable-toggle"
MAP = ".ensemblelab-observable-map"
SUMMARY = ".ensemblelab-selection-summary"
CAPTION = ".ensemblelab-structure-caption"


def _wait_for(page, check, what: str, timeout: float = 60.0) -> float:
    start = time.monotonic()
    while time.monotonic() - start < timeout:
        if check():
            return time.monotonic() - start
        page.wait_for_timeout(50)
    raise AssertionError(f"{what} within {timeout} s")


def _drawn_fraction(png: bytes) -> float:
    """Fraction of pixels that differ from the corner pixel (the background)."""
    import matplotlib.image as mpimg

    rgb = mpimg.imread(io.BytesIO(png), format="png")[..., :3]
    return float(np.any(np.abs(rgb - rgb[0, 0]) > 0.1, axis=-1).mean())


def test_browser_switch_shows_the_scattering_map(browser_page):
    page = browser_page
    buttons = page.locator(f"{SWITCH} button")
    labels = [t.strip() for t in buttons.all_inner_texts()]
    assert labels == ["photoelectron", "absorption", "scattering"], labels
    assert page.locator(MAP).count() == 0  # the photoelectron map is shown first
    start = time.monotonic()
    page.locator(f"{SWITCH} button", has_text="scattering").click()
    page.wait_for_selector(f"{MAP} .plotarea_background", timeout=60_000)
    # the map is drawn when the computation is over (status cleared) and the heat map has
    # its image
    _wait_for(page, lambda: page.locator(".ensemblelab-observable-status").inner_text() == ""
              and page.locator(f"{MAP} image").count() > 0, "the scattering map was not drawn")
    assert "q" in page.locator(MAP).inner_text()
    print(f"\nswitch to scattering -> map drawn: {time.monotonic() - start:.1f} s "
          "(printed, not asserted)")


def test_browser_scattering_band_lists_states_and_shows_geometries(browser_page):
    page = browser_page
    before_summary = page.locator(SUMMARY).inner_text()
    before_caption = page.locator(CAPTION).inner_text()
    box = page.locator(f"{MAP} .plotarea_background").bounding_box()
    # a box over the low-q stripe (about 1.0-1.55 1/A on the default 0.5-8 grid) at about
    # 150-350 fs (delays -50 to 500 fs from bottom to top)
    x0, x1 = box["x"] + 0.07 * box["width"], box["x"] + 0.14 * box["width"]
    y0, y1 = box["y"] + 0.27 * box["height"], box["y"] + 0.64 * box["height"]
    page.mouse.move(x0, y0)
    page.mouse.down()
    page.mouse.move(0.5 * (x0 + x1), 0.5 * (y0 + y1), steps=5)
    page.mouse.move(x1, y1, steps=5)
    page.mouse.up()
    round_trip = _wait_for(page, lambda: page.locator(SUMMARY).inner_text() != before_summary,
                           "the selection table did not change")
    _wait_for(page, lambda: page.locator(CAPTION).inner_text() != before_caption,
              "the structure caption did not change")
    text = page.locator(SUMMARY).inner_text()
    assert "scattering band" in text and "contributing snapshots" in text, text
    assert "Å⁻¹" in text, text  # the band is named in q, not in kinetic energy
    rows = page.locator(".ensemblelab-selection-rows option").all_inner_texts()
    assert rows and "%" in rows[0], rows
    caption = page.locator(CAPTION).inner_text()
    assert "trajectory" in caption and "share" in caption, caption
    page.wait_for_timeout(1500)  # let NGL finish the new structures
    drawn = _drawn_fraction(page.locator(".ensemblelab-ngl canvas").first.screenshot())
    assert drawn > 0.002, f"NGL canvas looks blank ({100 * drawn:.3f} % drawn pixels)"
    SCREENSHOTS.mkdir(exist_ok=True)
    shot = SCREENSHOTS / "observable_switch_scattering.png"
    page.screenshot(path=str(shot), full_page=False)
    assert shot.stat().st_size > 0
    print(f"\nbrush on the scattering map -> selection table: {1e3 * round_trip:.0f} ms; "
          f"NGL canvas {100 * drawn:.1f} % drawn; screenshot {shot} (printed, not asserted)")


def test_browser_absorption_map_of_the_demo_is_drawn(browser_page):
    page = browser_page
    image = page.locator(f"{MAP} image").first
    before = image.get_attribute("href") or image.get_attribute("xlink:href")
    page.locator(f"{SWITCH} button", has_text="absorption").click()
    # the demo's explorer adds its invented transition strengths: a map, not a hint
    _wait_for(page, lambda: (image.get_attribute("href") or image.get_attribute("xlink:href"))
              != before, "the absorption map was not drawn")
    status = page.locator(".ensemblelab-observable-status").inner_text()
    assert "transition_strengths" not in status, status
    assert "photon energy" in page.locator(MAP).inner_text()


def test_browser_switching_back_to_photoelectrons(browser_page):
    page = browser_page
    page.locator(f"{SWITCH} button", has_text="photoelectron").click()
    page.wait_for_selector(".ensemblelab-map .plotarea_background", timeout=60_000)
    _wait_for(page, lambda: page.locator(MAP).count() == 0,
              "the scattering map is still shown")
    _wait_for(page, lambda: "scattering" not in page.locator(SUMMARY).inner_text(),
              "the scattering band was not cleared")


def test_browser_console_has_no_unexpected_errors(browser_page):
    assert "error" not in browser_page.locator(".ensemblelab-messages").inner_text().lower()
    assert unexpected(browser_page.errors) == []
