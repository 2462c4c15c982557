"""The built-in page in Debian's chromium: loads cleanly, follows labels live, asks for a token.

The server runs as a real ``thresher serve`` subprocess on a free loopback port. What the page
shows is checked against the server's own JSON API answers and against the DOM the browser
built; nothing is stubbed.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest
from playwright.sync_api import (
    Browser,
    ConsoleMessage,
    Page,
    ViewportSize,
    expect,
    sync_playwright,
)

from conftest import free_port, require_binary

pytestmark = pytest.mark.browser

ARTIFACTS = Path(__file__).parent / "artifacts"
CHROMIUM_ARGS = [
    "--headless=new",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]
DESKTOP: ViewportSize = {"width": 1366, "height": 900}
PHONE: ViewportSize = {"width": 390, "height": 844}
LISTINGS = {
    "name": "listings",
    "classes": ["fine", "fraud"],
    "features": {
        "fields": {
            "title": {"kind": "text"},
            "price": {"kind": "numeric", "log1p": True},
            "category": {"kind": "categorical"},
        },
    },
    "bits": 16,
}
INJECTED_ID = "<img src=x onerror=window.__injected=1>"


class Server:
    """A `thresher serve` subprocess and plain-HTTP calls to it."""

    def __init__(self, base: str, proc: subprocess.Popen[bytes]) -> None:
        self.base = base
        self.proc = proc

    def call(self, method: str, path: str, body: Any = None, token: str | None = None) -> Any:
        headers = {"Accept": "application/json"}
        data = None
        if body is not None:
            data = json.dumps(body).encode()
            headers["Content-Type"] = "application/json"
        if token:
            headers["Authorization"] = f"Bearer {token}"
        request = urllib.request.Request(self.base + path, data, headers, method=method)
        with urllib.request.urlopen(request, timeout=10) as resp:
            return json.loads(resp.read() or b"null")


@contextmanager
def serving(tmp_path: Path, *extra: str) -> Iterator[Server]:
    """Run `thresher serve` on a free loopback port until the block ends."""
    port = free_port()
    log = (tmp_path / "server.log").open("wb")
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "thresher.cli",
            "serve",
            "--data-dir",
            str(tmp_path / "data"),
            "--port",
            str(port),
            "--snapshot-interval",
            "0",
            *extra,
        ],
        stdout=log,
        stderr=subprocess.STDOUT,
    )
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 30
        while True:
            if proc.poll() is not None:
                pytest.fail(f"thresher serve exited: {(tmp_path / 'server.log').read_text()}")
            try:
                with urllib.request.urlopen(base + "/readyz", timeout=2) as resp:
                    if resp.status == 200:
                        break
            except (urllib.error.URLError, ConnectionError):
                pass
            if time.monotonic() > deadline:
                pytest.fail("thresher serve did not become ready within 30 s")
            time.sleep(0.1)
        yield Server(base, proc)
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        log.close()


@pytest.fixture
def server(tmp_path: Path) -> Iterator[Server]:
    with serving(tmp_path) as running:
        yield running


@pytest.fixture(scope="module")
def browser() -> Iterator[Browser]:
    chromium = require_binary("chromium")
    with sync_playwright() as p:
        launched = p.chromium.launch(executable_path=chromium, args=CHROMIUM_ARGS)
        yield launched
        launched.close()


class Watched:
    """A page with every console error and uncaught exception collected."""

    def __init__(self, browser: Browser, viewport: ViewportSize) -> None:
        self.context = browser.new_context(viewport=viewport)
        self.page: Page = self.context.new_page()
        self.errors: list[str] = []
        self.page.on("console", self._console)
        self.page.on("pageerror", lambda exc: self.errors.append(f"pageerror: {exc}"))

    def _console(self, message: ConsoleMessage) -> None:
        if message.type == "error":
            self.errors.append(f"console: {message.text}")

    def close(self) -> None:
        self.context.close()


def _event(i: int, fraud: bool) -> dict[str, Any]:
    if fraud:
        return {
            "title": f"urgent sale phone {i % 3} pay first",
            "price": 20.0,
            "category": "phones",
        }
    return {
        "title": f"oak table number {i % 5} pickup only",
        "price": 150.0,
        "category": "furniture",
    }


def _labels(start: int, n: int, *, noisy: bool) -> list[dict[str, Any]]:
    """Labels that follow the event's look, or (noisy) ones that contradict it half the time."""
    out = []
    for i in range(start, start + n):
        fraud = i % 2 == 0
        truth = i % 4 in (1, 2) if noisy else fraud
        out.append(
            {"id": f"e{i}", "label": "fraud" if truth else "fine", "fields": _event(i, fraud)}
        )
    return out


def _percent(text: str) -> float:
    """The page's "12.3 %" back to a rate."""
    match = re.fullmatch(r"([0-9.]+) %", text.strip())
    assert match, f"not a percentage: {text!r}"
    return float(match.group(1)) / 100


def _matrix(confusion: Any, classes: list[str]) -> list[list[int]]:
    """The confusion counts as rows of truth by columns of prediction, whatever the shape."""
    if isinstance(confusion, dict):
        for key in ("truth_by_predicted", "matrix", "counts"):
            if key in confusion:
                return [[int(v) for v in row] for row in confusion[key]]
        return [[int(confusion.get(t, {}).get(p, 0)) for p in classes] for t in classes]
    return [[int(v) for v in row] for row in confusion]


def _path_d(page: Page, series: str) -> str:
    return (
        page.locator(f'[data-model="listings"] path[data-series="{series}"]').get_attribute("d")
        or ""
    )


def test_page_loads_and_follows_labels_live(server: Server, browser: Browser) -> None:
    """Stream mode: figures, chart, alarms and mistakes follow the API; markup stays text."""
    server.call("POST", "/api/models", LISTINGS)
    path = "/api/models/listings/labels"
    server.call("POST", path, {"labels": _labels(0, 400, noisy=False), "source": "review"})

    watched = Watched(browser, DESKTOP)
    page = watched.page
    try:
        page.goto(server.base + "/")
        card = page.locator('[data-model="listings"]')
        expect(card.locator("h2")).to_have_text("listings")
        labelled = card.locator('[data-figure="labelled"]')
        expect(labelled).to_have_text("400", timeout=5000)
        expect(page.locator("#status-text")).to_have_text("live", timeout=5000)
        expect(page.locator("#status-detail")).to_contain_text("stream")
        expect(card.locator(".chip")).to_have_text(["fine", "fraud"])
        expect(card.locator('[data-figure="snapshot"]')).to_have_text("none")

        before = server.call("GET", "/api/models/listings/quality")
        shown = _percent(card.locator('[data-figure="last_1000"]').inner_text())
        # The page rounds a rate to 0.1 percentage points, so it is within 0.0005 of the API's.
        assert abs(shown - before["mistake_rate"]["last_1000"]) < 0.0006
        d_before = _path_d(page, "last_1000")
        assert d_before.startswith("M")

        # Labels that contradict the events half the time: the mistake rate must climb.
        ack = server.call(
            "POST", path, {"labels": _labels(400, 300, noisy=True), "source": "appeals"}
        )
        assert ack["applied"] == 300 and ack["mistakes"] > 100
        expect(labelled).to_have_text("700", timeout=5000)
        page.wait_for_function(
            "([sel, old]) => { const p = document.querySelector(sel);"
            " return p && p.getAttribute('d') !== old; }",
            arg=['[data-model="listings"] path[data-series="last_1000"]', d_before],
            timeout=5000,
        )
        after = server.call("GET", "/api/models/listings/quality")
        assert after["mistake_rate"]["last_1000"] > before["mistake_rate"]["last_1000"] + 0.1
        shown_after = _percent(card.locator('[data-figure="last_1000"]').inner_text())
        assert abs(shown_after - after["mistake_rate"]["last_1000"]) < 0.0006
        assert shown_after > shown + 0.1
        expect(card.locator('[data-figure="rate"]')).not_to_have_text(re.compile(r"^(—|0\.0)$"))

        expect(card.locator('[data-count="appeals"]')).to_have_text("300")
        expect(card.locator('[data-count="review"]')).to_have_text("400")
        matrix = _matrix(after["confusion"], ["fine", "fraud"])
        fp = after.get("false_positives", matrix[0][1])
        fn = after.get("false_negatives", matrix[1][0])
        expect(card.locator('[data-count="false_positives"]')).to_have_text(f"{fp:,}")
        expect(card.locator('[data-count="false_negatives"]')).to_have_text(f"{fn:,}")

        # The calm-then-noisy stream fires the drift test; each alarm is a marker on the chart.
        alarms = after["drift"]["alarm_at"]
        assert len(alarms) >= 1 and all(400 < a <= 700 for a in alarms)
        expect(card.locator("line.alarm")).to_have_count(len(alarms))
        expect(card.locator(".drift-alarms")).to_have_text(
            f"{len(alarms)} alarm{'' if len(alarms) == 1 else 's'}"
        )

        # A mistake whose id is markup: it must show as text and never become an element.
        scored = server.call(
            "POST",
            "/api/models/listings/score",
            {"events": [{"id": INJECTED_ID, "fields": _event(1, False)}]},
        )
        wrong = "fine" if scored["results"][0]["label"] == "fraud" else "fraud"
        ack = server.call(
            "POST", path, {"labels": [{"id": INJECTED_ID, "label": wrong}], "source": "review"}
        )
        assert ack["mistakes"] == 1
        first = card.locator("tbody.mistake").first
        expect(first.locator("td.col-id")).to_have_text(INJECTED_ID, timeout=5000)
        expect(first.locator("td.col-true")).to_have_text(wrong)
        assert page.locator("main img").count() == 0
        assert page.evaluate("window.__injected") is None

        ARTIFACTS.mkdir(exist_ok=True)
        page.screenshot(path=str(ARTIFACTS / "page.png"), full_page=True)
        page.set_viewport_size(PHONE)
        page.wait_for_timeout(300)  # one resize-observer redraw
        width = page.evaluate("document.documentElement.scrollWidth")
        assert width <= PHONE["width"], f"the phone layout scrolls sideways ({width} px)"
        chart = card.locator("svg.rate-chart").bounding_box()
        assert chart is not None and chart["width"] <= PHONE["width"]
        page.screenshot(path=str(ARTIFACTS / "page-phone.png"), full_page=True)
        assert watched.errors == []
    finally:
        watched.close()


def test_multi_class_model_shows_the_confusion_matrix(server: Server, browser: Browser) -> None:
    """A three-class model gets the confusion matrix the API reports, cell by cell."""
    classes = ["billing", "bug", "account"]
    words = {
        "billing": "refund charge invoice",
        "bug": "crash error broken",
        "account": "password login email",
    }
    server.call(
        "POST",
        "/api/models",
        {
            "name": "tickets",
            "classes": classes,
            "bits": 14,
            "features": {"fields": {"body": {"kind": "text"}}},
        },
    )
    labels = [
        {"label": classes[i % 3], "fields": {"body": f"{words[classes[i % 3]]} {i % 7}"}}
        for i in range(90)
    ]
    server.call("POST", "/api/models/tickets/labels", {"labels": labels, "source": "triage"})

    watched = Watched(browser, DESKTOP)
    page = watched.page
    try:
        page.goto(server.base + "/")
        card = page.locator('[data-model="tickets"]')
        expect(card.locator('[data-figure="labelled"]')).to_have_text("90", timeout=5000)
        report = server.call("GET", "/api/models/tickets/quality")
        matrix = _matrix(report["confusion"], classes)
        assert sum(map(sum, matrix)) == 90
        cells = card.locator("table.confusion td")
        expect(cells).to_have_count(9)
        for i in range(3):
            for j in range(3):
                cell = card.locator(f'table.confusion td[data-cell="{i},{j}"]')
                expect(cell).to_have_text(f"{matrix[i][j]:,}")
        expect(card.locator("table.confusion tbody th")).to_have_text(classes)
        assert card.locator('[data-count="false_positives"]').count() == 0
        assert watched.errors == []
    finally:
        watched.close()


def test_token_form_when_the_server_needs_one(tmp_path: Path, browser: Browser) -> None:
    """A 401 brings up the token form; a good token switches the page to polling with it."""
    from thresher.auth import add_token

    tokens = tmp_path / "tokens.json"
    admin = add_token(tokens, name="ops", roles=["admin"])
    reader = add_token(tokens, name="wall", roles=["score"])
    with serving(tmp_path, "--tokens-file", str(tokens)) as server:
        server.call("POST", "/api/models", LISTINGS, token=admin)
        server.call(
            "POST",
            "/api/models/listings/labels",
            {"labels": _labels(0, 30, noisy=False), "source": "review"},
            token=admin,
        )

        watched = Watched(browser, PHONE)
        page = watched.page
        try:
            page.goto(server.base + "/")
            form = page.locator("#token-form")
            expect(form).to_be_visible(timeout=5000)
            expect(page.locator("#status-text")).to_have_text("token needed")
            assert page.locator('[data-model="listings"]').count() == 0

            page.fill("#token-input", "not-a-real-token")
            page.click("#token-form button[type=submit]")
            expect(page.locator("#token-error")).to_have_text("that token was refused")
            ARTIFACTS.mkdir(exist_ok=True)
            page.screenshot(path=str(ARTIFACTS / "page-token.png"))

            page.fill("#token-input", reader)
            page.click("#token-form button[type=submit]")
            card = page.locator('[data-model="listings"]')
            expect(card.locator('[data-figure="labelled"]')).to_have_text("30", timeout=6000)
            expect(form).to_be_hidden()
            expect(page.locator("#status-detail")).to_contain_text("polling")
            assert page.evaluate("sessionStorage.getItem('thresher.token')") == reader

            server.call(
                "POST",
                "/api/models/listings/labels",
                {"labels": _labels(30, 10, noisy=False), "source": "review"},
                token=admin,
            )
            expect(card.locator('[data-figure="labelled"]')).to_have_text("40", timeout=6000)

            page.click("#forget-token")
            expect(form).to_be_visible()
            assert page.evaluate("sessionStorage.getItem('thresher.token')") is None
            # The refused first load is the browser's own 401 report, not a page error.
            assert [e for e in watched.errors if "401" not in e] == []
        finally:
            watched.close()
