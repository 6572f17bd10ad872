"""The pages in a real browser: Debian's Chromium, driven by playwright (never a
downloaded browser). Screenshots go to test-artifacts/pages/ for people to look at.
"""

from __future__ import annotations

import os
import re
import socket
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import uvicorn

from tests.web.seed import XSS_ATTRIBUTE, XSS_SCRIPT, Seeded

CHROMIUM = Path("/usr/bin/chromium")
# The machine has no network: without the background-networking flags Chromium
# keeps trying to reach its services and floods the log with refused connections.
ARGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]

pytestmark = pytest.mark.slow


def _chromium() -> str:
    if CHROMIUM.exists():
        return str(CHROMIUM)
    message = "Debian's chromium is not installed (make browser installs it)"
    if os.environ.get("PLUMBWATCH_REQUIRE_BROWSER") == "1":
        pytest.fail(message)
    pytest.skip(message)


@pytest.fixture
def live(pages: Seeded) -> Iterator[str]:
    """The seeded app served over HTTP on a free loopback port (its lifespan already
    runs under the test client, so uvicorn starts without one)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    config = uvicorn.Config(
        pages.svc.client.app, host="127.0.0.1", port=port, lifespan="off", log_level="warning"
    )
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started:
        assert time.monotonic() < deadline, "the server did not start"
        time.sleep(0.05)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=20)


# One engine is enough to drive a browser; the page tests cover both.
@pytest.mark.parametrize("seeded_engine_url", ["sqlite"], indirect=True)
def test_pages_in_a_real_browser(pages: Seeded, live: str, artifacts: Path) -> None:
    sync_api = pytest.importorskip("playwright.sync_api")
    executable = _chromium()
    problems: list[str] = []
    with sync_api.sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=executable, args=ARGS)
        try:
            page = browser.new_page(viewport={"width": 1360, "height": 900})
            page.on("pageerror", lambda exc: problems.append(f"page error: {exc}"))
            page.on(
                "console",
                lambda msg: (
                    problems.append(f"console: {msg.text}") if msg.type == "error" else None
                ),
            )

            # Sign in: the browser is sent to the form and back where it wanted to go.
            page.goto(f"{live}/alerts")
            assert "/sign-in?next=%2Falerts" in page.url
            page.screenshot(path=artifacts / "sign-in.png")
            page.fill("#token", pages.svc.tokens["admin"])
            page.click("form.sign-in button[type=submit]")
            page.wait_for_url(f"{live}/alerts")
            assert page.locator("table[data-alert-state=active] tr[data-alert-id]").count() == 1
            assert page.locator("form[action='/alerts/1/acknowledge'] button").is_visible()
            page.screenshot(path=artifacts / "alerts.png", full_page=True)

            page.goto(f"{live}/")
            assert page.locator("#models tbody tr").count() == 3
            assert page.locator("#models .health").first.is_visible()
            page.screenshot(path=artifacts / "overview.png", full_page=True)

            page.goto(f"{live}/models/late-delivery")
            charts = page.locator("figure.chart-box svg.chart")
            assert charts.count() >= 7
            assert page.locator("figure.chart-box details.numbers table").count() == charts.count()
            rows = page.locator("#slice-table tbody tr")
            assert rows.count() == 15
            page.screenshot(path=artifacts / "model.png", full_page=True)
            for i, section in enumerate(page.locator("main > section").all()):
                section.screenshot(path=artifacts / f"model-section-{i}.png")

            # Sorting in place by the first-party script, without a page load.
            url = page.url
            page.click("#slice-table th[data-key=ece] a")
            assert page.url == url
            assert page.get_attribute("#slice-table th[data-key=ece]", "aria-sort") == "ascending"
            values = page.eval_on_selector_all(
                "#slice-table tbody tr td[data-metric=ece]",
                "cells => cells.map(c => c.getAttribute('data-sort'))",
            )
            numbers = [float(v) for v in values if v]
            assert numbers == sorted(numbers) and len(numbers) > 10

            # Slices whose values are markup: shown as text, never run.
            for payload in (XSS_SCRIPT, XSS_ATTRIBUTE):
                # The whole text, so that a cross holding the same value does not match.
                exact = re.compile(f"^{re.escape(f'region = {payload}')}$")
                link = page.locator("#slice-table tbody th a", has_text=exact)
                link.first.click()
                page.wait_for_load_state()
                assert page.locator("#selected-slice").inner_text() == f"region = {payload}"
                assert page.evaluate("() => window.__xss === undefined")
                assert page.locator("img").count() == 0
            page.screenshot(path=artifacts / "model-hostile-slice.png", full_page=True)

            page.click("header form button")  # sign out
            page.wait_for_url(f"{live}/sign-in")
            page.goto(f"{live}/")
            assert "/sign-in" in page.url
        finally:
            browser.close()
    assert problems == []
