"""Real-browser test: the spectrum explorer served by Voila, driven by Playwright in headless Chromium.

Needs Debian's chromium at /usr/bin/chromium (``.ci/run`` installs it; never Playwright's own
browser download). Locally without it the test is skipped with that reason; in CI
(DOPPLERKIT_CI=1) a missing browser fails the test instead. Screenshots are saved under
``test-artifacts/browser/`` (path printed).
"""

from __future__ import annotations

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


@pytest.fixture
def voila_url(tmp_path):
    _need_browser()
    port = _free_port()
    voila = Path(sys.executable).with_name("voila")
    log = (tmp_path / "voila.log").open("w")
    proc = subprocess.Popen(
        [
            str(voila),
            str(ROOT / "notebooks" / "01_spectrum_explorer.ipynb"),
            "--no-browser",
            f"--port={port}",
            "--Voila.ip=127.0.0.1",
            "--VoilaExecutor.timeout=20",
            "--ServerApp.disable_check_xsrf=True",
        ],
        stdout=log,
        stderr=subprocess.STDOUT,
        cwd=ROOT / "notebooks",
        start_new_session=True,
    )
    url = f"http://127.0.0.1:{port}/"
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=1):
                break
        except OSError:
            if proc.poll() is not None:
                pytest.fail(f"voila exited early; log: {(tmp_path / 'voila.log').read_text()[-2000:]}")
            time.sleep(0.3)
    yield url
    proc.terminate()
    try:
        proc.wait(timeout=15)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
    log.close()


def test_speed_control_changes_delta_readout(voila_url):
    from playwright.sync_api import expect, sync_playwright

    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    print(f"\nscreenshots in {ARTIFACTS}")
    with sync_playwright() as p:
        browser = p.chromium.launch(
            executable_path=CHROMIUM,
            args=[
                "--headless",
                "--no-sandbox",
                "--disable-gpu",
                "--disable-background-networking",
                "--disable-quic",
                "--no-first-run",
                "--disable-component-update",
                "--disable-sync",
            ],
        )
        try:
            page = browser.new_page(viewport={"width": 1200, "height": 1400})

            def only_loopback(route):
                host = re.match(r"^[a-z]+://([^/:]+)", route.request.url)
                if host and host.group(1) in ("127.0.0.1", "localhost"):
                    return route.continue_()
                return route.abort()  # e.g. Voila's font CDN: this machine has no internet

            page.route("**/*", only_loopback)
            page.goto(voila_url, timeout=120_000)
            readout = page.locator(".dk-readout .dk-delta").first
            expect(readout).to_be_visible(timeout=120_000)
            start = readout.inner_text()
            expected_start = f"{dk.doppler_factor(0.24, 57 * u.deg):.5f}"
            assert start == expected_start
            image = page.locator("img.dk-figure, .dk-figure img").first
            src_before = image.get_attribute("src")
            page.screenshot(path=str(ARTIFACTS / "explorer_start.png"), full_page=True)
            # set an exact speed in the text box beside the slider, then press Enter
            box = page.locator(".dk-speed-text input").first
            box.fill("0.6")
            box.press("Enter")
            expected = f"{dk.doppler_factor(0.6, 57 * u.deg):.5f}"
            expect(readout).to_have_text(expected, timeout=60_000)
            page.wait_for_function(
                "(before) => { const i = document.querySelector('img.dk-figure, .dk-figure img'); return i && i.src !== before; }",
                arg=src_before,
                timeout=60_000,
            )
            page.screenshot(path=str(ARTIFACTS / "explorer_beta_0.6.png"), full_page=True)
        finally:
            browser.close()
