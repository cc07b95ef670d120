"""The explorer at 1600 x 1000 in a real browser: what a figure for a paper needs.

Voila + Debian chromium on the shipped demo (an invented scenario). One page for the
module; the tests run in file order (colour bar, toggle, empty brush, sequential fit,
exclusion, photon energy) and write a screenshot of each view into
``tests/e2e/screenshots/`` (or ``$ENSEMBLELAB_E2E_SCREENSHOTS``) for review.
"""

from __future__ import annotations

import io
import re
import time

import numpy as np
import pytest

from .conftest import screenshot, unexpected

pytestmark = [pytest.mark.browser, pytest.mark.slow]

MAP = ".ensemblelab-map-view"


def _wait(predicate, what: str, timeout: float = 60.0, page=None) -> float:
    start = time.monotonic()
    while time.monotonic() - start < timeout:
        if predicate():
            return time.monotonic() - start
        if page is not None:
            page.wait_for_timeout(50)
        else:
            time.sleep(0.05)
    raise AssertionError(f"{what} within {timeout} s")


def _map_image(page) -> str:
    image = page.locator(".ensemblelab-map image").first
    return image.get_attribute("href") or image.get_attribute("xlink:href") or ""


def _brush(page, fx: tuple[float, float], fy: tuple[float, float]) -> None:
    """Drag a box over the map's plot area, in fractions of its width and height."""
    area = page.locator(".ensemblelab-map .plotarea_background").first
    area.scroll_into_view_if_needed()
    box = area.bounding_box()
    x0, x1 = (box["x"] + f * box["width"] for f in fx)
    y0, y1 = (box["y"] + f * box["height"] for f in fy)
    page.mouse.move(x0, y0)
    page.mouse.down()
    page.mouse.move(0.5 * (x0 + x1), 0.5 * (y0 + y1), steps=5)
    page.mouse.move(x1, y1, steps=5)
    page.mouse.up()


def _dropdown(page, scope: str, label: str):
    box = page.locator(f"{scope} .widget-dropdown").filter(
        has=page.locator("label", has_text=re.compile(rf"^\s*{re.escape(label)}\s*$")))
    return box.first.locator("select")


def _x_ticks(page) -> list[tuple[str, int]]:
    """Tick labels of the map's energy and delay axes (below or left of the plot area)."""
    area = page.locator(".ensemblelab-map .plotarea_background").first.bounding_box()
    texts = page.locator(".ensemblelab-map g.axis text")
    out = []
    for i in range(texts.count()):
        t = texts.nth(i)
        b = t.bounding_box()
        if not b or not (t.text_content() or "").strip():
            continue
        below = b["y"] > area["y"] + area["height"]
        left = b["x"] + b["width"] < area["x"]
        if below or left:  # position relative to the plot area (the page may scroll)
            pos = b["x"] - area["x"] if below else b["y"] - area["y"]
            out.append((t.text_content() or "", round(pos)))
    return sorted(out)


def _brush_rects(page) -> list[dict]:
    """Visible brush rectangles of the map (d3 brush ``rect.selection``), relative to the
    plot area."""
    area = page.locator(".ensemblelab-map .plotarea_background").first.bounding_box()
    rects = page.locator(".ensemblelab-map rect.selection")
    out = []
    for i in range(rects.count()):
        r = rects.nth(i)
        if r.is_visible():
            b = r.bounding_box()
            if b and b["width"] > 1 and b["height"] > 1:
                out.append({**b, "x": b["x"] - area["x"], "y": b["y"] - area["y"]})
    return out


def test_paper_colour_bar_has_its_label(paper_page):
    """The colour bar's label and unit are drawn: found in the DOM, along the bar, inside its
    figure (not clipped off), with dark pixels where it sits."""
    import matplotlib.image as mpimg

    page = paper_page
    screenshot(page, "01_page_top")
    bar = ".ensemblelab-map-colorbar"
    label = page.locator(f"{bar} text", has_text="intensity / eV⁻¹")
    assert label.count() >= 1, "the map's colour bar has no label with its unit"
    box = label.first.bounding_box()
    fig = page.locator(bar).first.bounding_box()
    assert box and box["height"] > 60 and box["width"] > 5  # drawn along the bar, readable
    assert fig["x"] <= box["x"] and box["x"] + box["width"] <= fig["x"] + fig["width"] + 1
    assert fig["y"] <= box["y"] and box["y"] + box["height"] <= fig["y"] + fig["height"] + 1
    ticks = [t for t in page.locator(f"{bar} g.tick text").all_text_contents() if t.strip()]
    assert len(ticks) >= 3, ticks
    values = [float(t.replace("−", "-")) for t in ticks]
    steps = np.diff(sorted(values))
    assert np.allclose(steps, steps[0])  # evenly spaced round ticks
    png = page.screenshot(clip=box)
    rgb = mpimg.imread(io.BytesIO(png), format="png")[..., :3]
    dark = (rgb.mean(axis=-1) < 0.5).mean()
    # the text of a label covers a few percent of its box (common practice for a pixel check)
    assert dark > 0.02, f"colour bar label box looks empty ({100 * dark:.2f} % dark pixels)"
    screenshot(page, "02_map_view", MAP)


def test_paper_toggle_keeps_axes_and_moves_the_brush(paper_page):
    page = paper_page
    summary = ".ensemblelab-selection-summary"
    before = page.locator(summary).inner_text()
    _brush(page, (0.15, 0.45), (0.3, 0.6))
    _wait(lambda: page.locator(summary).inner_text() != before, "the band table updated",
          page=page)
    ticks = _x_ticks(page)
    rects = _brush_rects(page)
    assert len(rects) == 1, rects
    for layer in ("measured", "residual", "simulated"):
        image = _map_image(page)
        page.locator(f"{MAP} button", has_text=layer).first.click()
        _wait(lambda old=image: _map_image(page) != old, f"the {layer} map drawn", page=page)
        page.wait_for_timeout(300)
        def same_axes() -> bool:  # one set of axes for every layer (to two pixels)
            now = _x_ticks(page)
            return [t for t, _ in now] == [t for t, _ in ticks] and all(
                abs(a - b) <= 2 for (_, a), (_, b) in zip(now, ticks, strict=True))

        _wait(same_axes, f"the {layer} map on the simulated map's axes {ticks}", timeout=10,
              page=page)
        now = _brush_rects(page)
        assert len(now) == 1, (layer, now)  # one brush, no ghost
        for key in ("x", "y", "width", "height"):
            assert abs(now[0][key] - rects[0][key]) < 2.0, (layer, key)
        if layer == "residual":
            text = page.locator(".ensemblelab-comparison").inner_text()
            assert "residual = measured − model" in text and "R²" in text, text
            assert page.locator(".ensemblelab-map-colorbar text",
                                has_text="residual / arb. u.").count() >= 1
            screenshot(page, "03_residual", MAP)
        if layer == "measured":
            screenshot(page, "04_measured", MAP)
    assert "error" not in page.locator(".ensemblelab-messages").inner_text().lower()


def test_paper_empty_brush_says_no_signal(paper_page):
    page = paper_page
    ticks = _x_ticks(page)
    _dropdown(page, MAP, "energies").select_option("full grid")
    _wait(lambda: _x_ticks(page) != ticks, "the energy axis widened", page=page)
    page.wait_for_timeout(300)
    summary = ".ensemblelab-selection-summary"
    before = page.locator(summary).inner_text()
    # the right edge of the full grid: kinetic energies near h nu, far above the signal
    _brush(page, (0.90, 0.99), (0.55, 0.95))
    _wait(lambda: page.locator(summary).inner_text() != before, "the band table updated",
          page=page)
    assert "no signal here" in page.locator(summary).inner_text().lower()
    assert "no signal here" in page.locator(".ensemblelab-band-label").inner_text().lower()
    rows = page.locator(".ensemblelab-selection-rows option").all_inner_texts()
    assert rows == [], rows  # nothing listed, no "100 %" of an empty band
    screenshot(page, "05_empty_brush", ".ensemblelab-selection-summary")
    _dropdown(page, MAP, "energies").select_option("with signal")


def test_paper_sequential_fit_labels_each_tau(paper_page):
    page = paper_page
    scope = ".ensemblelab-population-view"
    label = ".ensemblelab-fit-label"
    before = page.locator(label).inner_text()
    _dropdown(page, scope, "fit").select_option("sequential")
    _wait(lambda: "sequential fit" in page.locator(label).inner_text(),
          f"a sequential fit label (was {before!r})", page=page)
    text = page.locator(label).inner_text()
    # each time constant names its states, e.g. "tau1 (S2 → S1) = ... fs"
    assert re.search(r"tau1 \(\S+ → \S+\) = [\d.]+ fs", text), text
    assert re.search(r"tau2 \(\S+ → \S+\) = [\d.]+ fs", text), text
    roles = page.locator(f"{scope} .ensemblelab-fit-states select")
    assert roles.count() >= 2 and roles.first.is_visible()
    messages = page.locator(".ensemblelab-messages").inner_text()
    assert "fit_states" not in messages and "error" not in messages.lower(), messages
    screenshot(page, "06_populations_sequential", scope)


def test_paper_header_follows_an_exclusion(paper_page):
    page = paper_page
    header = ".ensemblelab-header-counts"
    text = page.locator(header).inner_text()
    n = int(re.match(r"(\d+) trajectories", text).group(1))
    page.locator(".lm-TabBar-tab", has_text="quality").first.click()
    select = page.locator(".ensemblelab-quality-rows select")
    _wait(lambda: select.locator("option").count() > 0, "flagged trajectories listed",
          timeout=120, page=page)
    select.select_option(index=0)
    page.locator("button.ensemblelab-quality-exclude").click()
    _wait(lambda: f"{n - 1} trajectories" in page.locator(header).inner_text(),
          "the header counting one trajectory less", page=page)
    assert f"1 of {n} excluded" in page.locator(header).inner_text()
    assert page.locator(".ensemblelab-n-excluded").inner_text() == "1"
    screenshot(page, "07_quality_after_exclusion", ".ensemblelab-quality-summary")
    # "show trajectory" brings the trajectory tab forward
    page.locator("button.ensemblelab-quality-show-trajectory").click()
    _wait(lambda: "lm-mod-current" in (page.locator(".lm-TabBar-tab", has_text="trajectory")
                                       .first.get_attribute("class") or ""),
          "the trajectory tab shown", page=page)
    screenshot(page, "08_trajectory_tab", ".ensemblelab-trajectory-info")
    page.locator(".lm-TabBar-tab", has_text="export").first.click()
    screenshot(page, "09_export_tab", ".ensemblelab-export-tables-csv")
    screenshot(page, "10_structures_and_table", ".ensemblelab-ngl canvas")


def test_paper_photon_energy_change_draws_cleanly(paper_page):
    page = paper_page
    n_errors = len(page.errors)
    box = page.locator(f"{MAP} .widget-text").filter(
        has=page.locator("label", has_text="probe hν")).first.locator("input")
    image = _map_image(page)
    box.fill("6.2")
    box.press("Enter")
    _wait(lambda: _map_image(page) != image, "the 6.2 eV map drawn", page=page)
    page.wait_for_timeout(1500)
    new = unexpected(page.errors[n_errors:])
    assert new == [], new  # no translate(undefined) / NaN path errors
    assert "error" not in page.locator(".ensemblelab-messages").inner_text().lower()
    screenshot(page, "11_map_6.2eV", MAP)
    assert np.isfinite(float(box.input_value()))


def test_paper_button_labels_and_ticks_are_not_cut(paper_page):
    page = paper_page
    # toggle-button labels fit their buttons (no "simula...")
    cut = page.evaluate("""() => Array.from(document.querySelectorAll(
        '.ensemblelab-explorer .widget-toggle-button')).filter(
        b => b.offsetParent !== null && b.scrollWidth > b.clientWidth + 1).map(
        b => b.textContent.trim())""")
    assert cut == [], cut
    # the populations' last time tick sits inside its figure (not clipped at the right)
    fig = page.locator(".ensemblelab-populations").first
    fig.scroll_into_view_if_needed()
    box = fig.bounding_box()
    ticks = fig.locator("g.axis g.tick text")
    rights = [b["x"] + b["width"] for b in (ticks.nth(i).bounding_box()
                                            for i in range(ticks.count())) if b]
    assert rights and max(rights) <= box["x"] + box["width"], (max(rights), box)


def test_paper_decomposition_small_multiples(paper_page):
    page = paper_page
    _dropdown(page, MAP, "show").select_option("diabatic pair")
    grid = ".ensemblelab-small-colorbar"
    _wait(lambda: page.locator(grid).count() > 0, "the decomposition grid shown", page=page)
    page.wait_for_timeout(1500)
    # one shared colour bar with its label and unit; axis labels on the outer panels only
    assert page.locator(f"{grid} text", has_text="intensity / eV⁻¹").count() == 1
    screenshot(page, "12_decomposition", grid)
    panels = page.locator(f"{MAP} .widget-gridbox .plotarea_background")
    n = panels.count()
    assert n >= 2, (n, page.errors[-5:])
    y_labels = page.locator(f"{MAP} .widget-gridbox text", has_text="delay / fs").count()
    assert 1 <= y_labels < n  # left column only
    titles = page.locator(f"{MAP} .widget-gridbox text.mainheading").all_text_contents()
    assert all(len(t) <= 12 for t in titles), titles  # short titles (full ones on hover)
    errors = page.locator(".ensemblelab-messages").inner_text().lower()
    assert "error" not in errors
    _dropdown(page, MAP, "show").select_option("total")


def test_paper_structure_view_stays_on_the_page(paper_page):
    """Long captions wrap: the structure viewer keeps its place beside the map at 1600 px."""
    page = paper_page
    _dropdown(page, MAP, "show").select_option("diabatic pair")
    _wait(lambda: page.locator(".ensemblelab-small-colorbar").count() > 0,
          "the decomposition grid shown", page=page)
    page.wait_for_timeout(1000)
    canvas = page.locator(".ensemblelab-ngl").first.bounding_box()
    assert canvas["x"] + canvas["width"] <= 1600, canvas
    _dropdown(page, MAP, "show").select_option("total")
