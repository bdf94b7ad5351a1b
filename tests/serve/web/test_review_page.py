"""The reviewer's page in a real browser: Debian's headless Chromium driven by Playwright.

The page loads (no token), takes a token, shows the oldest waiting case (an 8x8
digit drawn on a canvas), a key press decides it, the next case appears, and the
decision is in the store. The page's strict Content-Security-Policy is live, so
any inline script or style would show as a console error here. A screenshot is
kept at test-artifacts/review-page.png.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

pytestmark = [pytest.mark.browser]

CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = Path(__file__).resolve().parents[3] / "test-artifacts"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run"]
TOKEN = "desk-token-browser"


@pytest.fixture()
def live_app(tiny_bundle_factory: Callable[..., Any], make_app: Callable[..., Any]) -> Iterator[tuple[Any, str]]:
    """The app on a real socket on 127.0.0.1 (werkzeug's threaded server), every case abstaining."""
    from werkzeug.serving import make_server

    app = make_app(tiny_bundle_factory(task="classification", kind="stacked", draws=8), threshold=-1.0,
                   review_tokens=TOKEN, audit_fraction=0.0)
    server = make_server("127.0.0.1", 0, app, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield app, f"http://127.0.0.1:{server.server_port}"
    finally:
        server.shutdown()
        thread.join(timeout=10)
        server.server_close()


def _digit_seven() -> list[float]:
    rows = ["01616161616160", "00000001612000", "00000016400000", "00000161000000",
            "00001612000000", "00016400000000", "00161000000000", "00000000000000"]
    grid = [[0.0] * 8 for _ in range(8)]
    for r, (row) in enumerate(rows):
        cells = [row[i:i + 2] for i in range(0, 14, 2)]
        for c, v in enumerate(cells):
            grid[r][c] = float(int(v))
    return [v for row in grid for v in row]


def test_page_shows_a_case_a_key_decides_it_and_the_next_appears(live_app: tuple[Any, str]) -> None:
    if not CHROMIUM.exists():
        pytest.skip(f"!!! {CHROMIUM} is missing (Debian package 'chromium'); the browser test did NOT run")
    sync_api = pytest.importorskip("playwright.sync_api")
    expect = sync_api.expect
    app, base = live_app
    client = app.test_client()
    cases = [_digit_seven(), [float((i * 3) % 17) for i in range(64)], [float(i % 5) for i in range(64)]]
    r = client.post("/v1/predict", json={"cases": cases, "case_ids": ["depot-7-0001", "depot-7-0002", "depot-7-0003"]})
    ids = [res["review_id"] for res in r.json["results"]]
    store = app.extensions["demur"].review.store

    problems: list[str] = []
    ARTIFACTS.mkdir(exist_ok=True)
    with sync_api.sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=str(CHROMIUM), args=ARGS, headless=True)
        try:
            page = browser.new_page(viewport={"width": 1200, "height": 900})
            page.on("console", lambda m: problems.append(m.text) if m.type == "error" else None)
            page.on("pageerror", lambda e: problems.append(str(e)))
            page.goto(f"{base}/review", timeout=30_000)
            assert page.locator("#signin").is_visible()
            assert "never replaces, qualified human judgement" in page.locator(".caution").inner_text()
            page.fill("#token", TOKEN)
            page.click("#token-form button[type=submit]")
            page.wait_for_selector("#desk:not([hidden])", timeout=15_000)
            expect(page.locator("#item-id")).to_have_text(ids[0], timeout=15_000)
            assert page.locator("#digit").is_visible()
            assert page.locator("#probs li").count() == 10
            assert page.locator("#label-buttons button").count() == 10
            assert "waiting: 2" in page.locator("#waiting").inner_text()
            assert "nats" in page.locator("#mi").inner_text()
            page.screenshot(path=str(ARTIFACTS / "review-page.png"), full_page=True)

            page.keyboard.press("7")  # decide: label 7
            expect(page.locator("#item-id")).to_have_text(ids[1], timeout=15_000)
            first = store.get(ids[0])
            assert (first.status, first.label) == ("decided", "7")
            assert first.decided_by == store.get(ids[1]).reviewer  # same token, same reviewer

            page.keyboard.press("s")  # skip: give it back, the next one appears
            expect(page.locator("#item-id")).to_have_text(ids[2], timeout=15_000)
            assert store.get(ids[1]).status == "pending"

            page.fill("#note", "looks like a 1 with a flag; 1 2 3 typed here are text")
            page.click("#label-buttons button[data-label='1']")
            page.wait_for_selector("#empty:not([hidden])", timeout=15_000)
            third = store.get(ids[2])
            assert (third.label, third.note) == ("1", "looks like a 1 with a flag; 1 2 3 typed here are text")
        finally:
            browser.close()
    assert not problems, problems
    assert store.counts() == {"pending": 1, "claimed": 0, "decided": 2, "total": 3}
    assert (ARTIFACTS / "review-page.png").stat().st_size > 10_000
