"""Real browser: the map view's uncertainty toggle draws its layer and bands without errors.

Check values: the colour-bar label and the status text are the package's own wording;
"no unexpected console error" is common practice for a front-end smoke test.
"""

from __future__ import annotations

import pytest

from .conftest import screenshot, unexpected

pytestmark = [pytest.mark.browser, pytest.mark.slow]

CONTROLS = ".ensemblelab-uncertainty"
STATUS = ".ensemblelab-uncertainty-status"
#: filled areas drawn in a figure (a hidden mark's group has display: none; an empty band
#: is a degenerate path of a few characters)
BANDS = ("(fig) => Array.from(document.querySelectorAll(fig + ' path.area')).filter(p => "
         "(p.getAttribute('d') || '').length > 40 && !(p.parentNode.parentNode"
         ".getAttribute('style') || '').includes('display: none')).length")


def test_browser_uncertainty_toggle_draws_layer_and_bands(browser_page):
    page = browser_page
    page.locator(CONTROLS).first.scroll_into_view_if_needed()
    assert page.evaluate(BANDS, ".ensemblelab-delay-cut") == 0  # off by default: no band
    page.locator(f"{CONTROLS} button", has_text="uncertainty").first.click()
    # the bootstrap runs in the background inside the kernel; the status says when done
    page.wait_for_function(
        f"() => (document.querySelector('{STATUS}')?.innerText || '')"
        ".includes('median relative standard error')", timeout=180_000)
    status = page.locator(STATUS).first.inner_text()
    assert "%" in status and "resamples of whole trajectories" in status
    page.locator(f"{CONTROLS} button", has_text="relative uncertainty").first.click()
    page.wait_for_function(
        "() => Array.from(document.querySelectorAll('.ensemblelab-map-colorbar text'))"
        ".some(t => t.textContent.includes('relative standard error / %'))", timeout=30_000)
    # the bands: one filled path in each cut figure
    for fig in (".ensemblelab-delay-cut", ".ensemblelab-energy-cut"):
        page.wait_for_function(f"() => ({BANDS})('{fig}') > 0", timeout=30_000)
    # the caption follows the bands in a later message (a layer change redraws the cuts,
    # which resets the caption before the bands' text is set again): wait for it
    page.wait_for_function(
        "() => (document.querySelector('.ensemblelab-cut-caption')?.innerText || '')"
        ".includes('bootstrap interval of each cut')", timeout=30_000)
    screenshot(page, "uncertainty_layer", CONTROLS)
    assert "error" not in page.locator(".ensemblelab-messages").inner_text().lower()
    errs = unexpected(page.errors)
    assert errs == [], "\n".join(errs)
