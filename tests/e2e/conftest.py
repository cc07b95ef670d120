"""Real-browser harness: Voila serving the explorer, Debian chromium driven by Playwright.

A missing browser is a failure, not a skip: the test script installs chromium.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import pytest

CHROMIUM = os.environ.get("ENSEMBLELAB_CHROMIUM", "/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                 "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync"]
#: console errors that are harmless offline (a web font from a public CDN)
HARMLESS = (re.compile(r"Failed to load resource: net::ERR_(NAME_NOT_RESOLVED|"
                       r"INTERNET_DISCONNECTED|CONNECTION_REFUSED)"),)


def _chromium() -> str:
    if not Path(CHROMIUM).exists():
        pytest.fail(f"chromium not found at {CHROMIUM}: install it with "
                    "'apt-get install -y chromium' (scripts/test.sh does)", pytrace=False)
    return CHROMIUM


@pytest.fixture(scope="module")
def explore_server(tmp_path_factory):
    """``ensemblelab explore`` on the demo data; yields (url with its token, seconds until the
    URL printed)."""
    from ensemblelab.cli._explore import free_port, stop_process_group

    data = os.environ.get("ENSEMBLELAB_E2E_DATA")  # default: the shipped demo data
    folder = tmp_path_factory.mktemp("explore")
    port = free_port()
    cmd = [sys.executable, "-m", "ensemblelab", "explore", "--port", str(port),
           "--notebook-dir", str(folder), "--exports", str(folder / "exports")] + (
        [data] if data else [])
    env = dict(os.environ)
    env["JUPYTER_RUNTIME_DIR"] = str(folder / "runtime")
    env["JUPYTER_CONFIG_DIR"] = str(folder / "config")
    env["JUPYTER_DATA_DIR"] = str(folder / "data")
    start = time.monotonic()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,
                            start_new_session=True, cwd=str(folder), env=env)
    lines: list[str] = []
    found = threading.Event()

    def read() -> None:
        for line in proc.stdout:  # type: ignore[union-attr]
            lines.append(line)
            if "http://127.0.0.1:" in line:
                found.set()

    threading.Thread(target=read, daemon=True).start()
    try:
        if not found.wait(timeout=180):
            pytest.fail(f"ensemblelab explore printed no URL: {lines!r}, status {proc.poll()}")
        url = re.search(r"http://127\.0\.0\.1:\d+/\?token=[0-9a-f]{32,}", "".join(lines)).group(0)
        yield url, time.monotonic() - start
    finally:
        stop_process_group(proc)


#: where the tests write their screenshots for review (gitignored)
SCREENSHOTS = Path(os.environ.get("ENSEMBLELAB_E2E_SCREENSHOTS",
                                  Path(__file__).resolve().parent / "screenshots"))


def screenshot(page, name: str, selector: str | None = None) -> Path:
    """Save a PNG of the viewport (scrolled to `selector`'s element, if given) for review."""
    SCREENSHOTS.mkdir(parents=True, exist_ok=True)
    path = SCREENSHOTS / f"{name}.png"
    if selector is not None:
        page.locator(selector).first.scroll_into_view_if_needed()
    page.screenshot(path=str(path))
    return path


@pytest.fixture(scope="module")
def browser_page(explore_server):
    """A chromium page with the explorer rendered; console errors collected in page.errors."""
    yield from _page(explore_server, {"width": 1400, "height": 1800})


@pytest.fixture(scope="module")
def paper_page(explore_server):
    """The explorer at 1600 x 1000 (the size of the screenshots for review)."""
    yield from _page(explore_server, {"width": 1600, "height": 1000})


def _page(explore_server, viewport):
    from playwright.sync_api import sync_playwright

    url, _ = explore_server
    exe = _chromium()
    with sync_playwright() as pw, tempfile.TemporaryDirectory() as profile:
        ctx = pw.chromium.launch_persistent_context(
            profile, executable_path=exe, args=CHROMIUM_ARGS, viewport=viewport)
        page = ctx.pages[0] if ctx.pages else ctx.new_page()
        errors: list[str] = []
        page.on("console", lambda m: errors.append(m.text) if m.type == "error" else None)
        page.on("pageerror", lambda exc: errors.append(f"page error: {exc}"))
        start = time.monotonic()
        page.goto(url, timeout=240_000)
        page.wait_for_selector(".ensemblelab-explorer", timeout=240_000)
        page.wait_for_selector(".ensemblelab-ngl canvas", timeout=60_000)
        page.render_seconds = time.monotonic() - start
        page.errors = errors
        print(f"\nexplorer page rendered {page.render_seconds:.1f} s after loading {url}")
        yield page
        ctx.close()


def unexpected(errors: list[str]) -> list[str]:
    """Console errors that are not on the harmless list."""
    return [e for e in errors if not any(p.search(e) for p in HARMLESS)]
