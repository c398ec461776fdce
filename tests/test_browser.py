"""Real-browser tests: every notebook served by Voila, driven by Playwright in headless Chromium.

Each notebook must show its figures (image elements with non-blank pixels, no text repr of a
figure anywhere on the page), and one interaction per notebook must change an image.

Needs Debian's chromium at /usr/bin/chromium (``.ci/run`` installs it; never Playwright's own
browser download). Locally without it the test is skipped with that reason; in CI
(DOPPLERKIT_CI=1) a missing browser fails the test instead. Screenshots are saved under
``test-artifacts/browser/`` (path printed): ``<notebook>_start.png`` after load and
``<notebook>_after.png`` after the interaction.
"""

from __future__ import annotations

import contextlib
import os
import re
import socket
import subprocess
import sys
import time
from pathlib import Path

import astropy.units as u
import pytest

import dopplerkit as dk

ROOT = Path(__file__).resolve().parent.parent
CHROMIUM = "/usr/bin/chromium"
ARTIFACTS = ROOT / "test-artifacts" / "browser"

pytestmark = pytest.mark.browser


def _need_browser():
    if Path(CHROMIUM).exists():
        return
    if os.environ.get("DOPPLERKIT_CI"):
        pytest.fail(f"{CHROMIUM} is missing in CI: .ci/run must install Debian's chromium")
    pytest.skip(f"{CHROMIUM} not installed (apt-get install -y --no-install-recommends chromium); runs in CI")


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


NOTEBOOKS = {p.stem[:2]: p for p in sorted((ROOT / "notebooks").glob("*.ipynb"))}

CHROMIUM_ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-quic",
    "--no-first-run",
    "--disable-component-update",
    "--disable-sync",
]


def _serve(notebook: Path, tmp_path: Path):
    port = _free_port()
    voila = Path(sys.executable).with_name("voila")
    log_path = tmp_path / f"voila_{notebook.stem}.log"
    log = log_path.open("w")
    proc = subprocess.Popen(
        [
            str(voila),
            str(notebook),
            "--no-browser",
            f"--port={port}",
            "--Voila.ip=127.0.0.1",
            "--VoilaExecutor.timeout=180",
            "--ServerApp.disable_check_xsrf=True",
        ],
        stdout=log,
        stderr=subprocess.STDOUT,
        cwd=ROOT / "notebooks",
        start_new_session=True,
    )
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=1):
                break
        except OSError:
            if proc.poll() is not None:
                pytest.fail(f"voila exited early; log: {log_path.read_text()[-2000:]}")
            time.sleep(0.3)
    return proc, log, f"http://127.0.0.1:{port}/"


@pytest.fixture
def serve(tmp_path):
    _need_browser()
    running = []

    def start(key):
        proc, log, url = _serve(NOTEBOOKS[key], tmp_path)
        running.append((proc, log))
        return url

    yield start
    for proc, log in running:
        proc.terminate()
        try:
            proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        log.close()


# In the page: every <img> loaded, and how many of them show more than one colour (a blank or
# failed image is one flat colour). Images are drawn on a canvas of their natural size.
_IMAGES_JS = """
() => Array.from(document.images).map(img => {
    if (!img.complete || img.naturalWidth === 0) return {src: img.src.slice(0, 40), ok: false, colours: 0};
    const c = document.createElement('canvas');
    c.width = img.naturalWidth; c.height = img.naturalHeight;
    const g = c.getContext('2d');
    g.drawImage(img, 0, 0);
    const d = g.getImageData(0, 0, c.width, c.height).data;
    const seen = new Set();
    for (let i = 0; i < d.length && seen.size < 3; i += 4 * 97) seen.add(d[i] + ',' + d[i + 1] + ',' + d[i + 2]);
    return {src: img.src.slice(0, 40), ok: true, colours: seen.size, width: img.naturalWidth};
})
"""


def _open(p, url, ready_selector):
    from playwright.sync_api import expect

    browser = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
    # tall enough that the whole notebook is on the screenshot (Voila scrolls inside its own container)
    page = browser.new_page(viewport={"width": 1200, "height": 3400})

    def only_loopback(route):
        host = re.match(r"^[a-z]+://([^/:]+)", route.request.url)
        if host and host.group(1) in ("127.0.0.1", "localhost"):
            return route.continue_()
        return route.abort()  # e.g. Voila's font CDN: this machine has no internet

    page.route("**/*", only_loopback)
    page.goto(url, timeout=300_000)
    expect(page.locator(ready_selector).first).to_be_visible(timeout=300_000)
    return browser, page


def _check_figures(page, key, n_min):
    """Every image drawn (more than one colour), at least n_min of them, no text repr of a figure."""
    page.wait_for_function(
        "(n) => Array.from(document.images).filter(i => i.complete && i.naturalWidth > 0).length >= n", arg=n_min, timeout=120_000
    )
    images = page.evaluate(_IMAGES_JS)
    drawn = [im for im in images if im["ok"] and im["colours"] > 1]
    assert len(drawn) >= n_min, f"notebook {key}: {len(drawn)} drawn images of {len(images)}, need {n_min}: {images}"
    text = page.inner_text("body")
    assert "<Figure size" not in text and "Traceback" not in text, f"notebook {key} shows a figure repr or an error"


def _image_changes(page, selector, action):
    before = page.locator(selector).first.get_attribute("src")
    action()
    page.wait_for_function(
        "([sel, before]) => { const i = document.querySelector(sel); return i && i.src !== before; }",
        arg=[selector, before],
        timeout=120_000,
    )


def _shots(page, key, when):
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    path = ARTIFACTS / f"notebook_{key}_{when}.png"
    page.screenshot(path=str(path), full_page=True)
    print(f"\nscreenshot {path}")


@contextlib.contextmanager
def _notebook(serve, key, ready, n_figures):
    """Serve notebook ``key``, open it, check its figures, screenshot it; yield the page; screenshot it again."""
    from playwright.sync_api import sync_playwright

    url = serve(key)
    with sync_playwright() as p:
        browser, page = _open(p, url, ready)
        try:
            _check_figures(page, key, n_figures)
            _shots(page, key, "start")
            yield page
            _shots(page, key, "after")
        finally:
            browser.close()


def _enter(page, selector, text):
    """Type ``text`` into the input under ``selector`` and press Enter."""

    def act():
        box = page.locator(selector).first
        box.fill(text)
        box.press("Enter")

    return act


def test_notebook_01_speed_control_changes_delta_readout(serve):
    from playwright.sync_api import expect

    with _notebook(serve, "01", ".dk-readout .dk-delta", 2) as page:  # the explorer and the constraint plane
        readout = page.locator(".dk-readout .dk-delta").first
        assert readout.inner_text() == f"{dk.doppler_factor(0.24, 57 * u.deg):.5f}"
        _image_changes(page, ".dk-explorer img.dk-figure", _enter(page, ".dk-speed-text input", "0.6"))
        expect(readout).to_have_text(f"{dk.doppler_factor(0.6, 57 * u.deg):.5f}", timeout=60_000)


def test_notebook_02_fit_button_redraws_the_precession_explorer(serve):
    from playwright.sync_api import expect

    with _notebook(serve, "02", ".dk-precession img.dk-figure", 2) as page:  # the model figure and the explorer
        _image_changes(page, ".dk-precession img.dk-figure", lambda: page.locator(".dk-precession .dk-fit").first.click())
        # the message comes after the last redraw with the fitted values
        expect(page.locator(".dk-precession").first).to_contain_text("fitted (curves drawn", timeout=120_000)
        page.wait_for_timeout(1500)  # the last image reaches the page


def test_notebook_03_host_redshift_changes_the_outflow_reading(serve):
    from playwright.sync_api import expect

    with _notebook(serve, "03", ".dk-outflow img.dk-figure", 2) as page:  # the line fit and the explorer's locus
        text = page.locator(".dk-outflow-text").first
        before = text.inner_text()
        _image_changes(page, ".dk-outflow img.dk-figure", _enter(page, ".dk-outflow-zhost input", "0.8"))
        expect(text).not_to_have_text(before, timeout=60_000)


def test_notebook_04_status_filter_changes_the_population_plane(serve):
    from playwright.sync_api import expect

    # the population figure, the explorer's plane and its spectrum
    with _notebook(serve, "04", ".dk-population img.dk-figure", 3) as page:
        button = page.locator(".dk-status button", has_text="suspect").first
        spectrum = ".dk-population img.dk-population-spectrum"
        before = page.locator(spectrum).first.get_attribute("src")
        _image_changes(page, ".dk-population img.dk-figure", button.click)
        expect(page.locator(".dk-population-detail").first).to_contain_text("suspect", timeout=120_000)
        page.wait_for_function(  # the chosen suspect row's spectrum, measured again, replaces the first one
            "([sel, before]) => { const i = document.querySelector(sel); return i && i.src !== before; }",
            arg=[spectrum, before],
            timeout=120_000,
        )
        page.wait_for_timeout(1000)
