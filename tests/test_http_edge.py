"""The middleware over a real socket: per-route counts and latencies, the in-flight cap, and
bodies that once reached the internal-error answer."""

from __future__ import annotations

import asyncio
import re
import time
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import pytest
from aiohttp import ClientSession, web
from aiohttp.test_utils import TestServer

from thresher.http import create_app
from thresher.settings import Settings

MODEL = {
    "name": "m",
    "classes": ["fine", "fraud"],
    "features": {
        "fields": {
            "title": {"kind": "text"},
            "price": {"kind": "numeric"},
            "code": {"kind": "categorical"},
        }
    },
    "bits": 12,
}
SCORE = "/api/models/m/score"


class Server:
    def __init__(self, server: TestServer, session: ClientSession) -> None:
        self.server, self.session = server, session

    def url(self, path: str) -> str:
        return str(self.server.make_url(path))

    async def post(self, path: str, raw: bytes, ctype: str = "application/json") -> Any:
        headers = {"Content-Type": ctype}
        async with self.session.post(self.url(path), data=raw, headers=headers) as resp:
            return resp.status, await resp.json(content_type=None), resp.headers

    async def get_text(self, path: str) -> str:
        async with self.session.get(self.url(path)) as resp:
            return await resp.text()


async def _serve(tmp_path: Path, **overrides: Any) -> Server:
    values = {"data_dir": str(tmp_path / "data"), "snapshot_interval": 0, **overrides}
    app: web.Application = create_app(Settings.from_mapping(values))
    server = TestServer(app, host="127.0.0.1")
    await server.start_server()
    session = ClientSession()
    for _ in range(200):
        async with session.get(server.make_url("/readyz")) as resp:
            if resp.status == 200:
                break
        await asyncio.sleep(0.01)
    return Server(server, session)


@pytest.fixture
async def started(tmp_path: Path) -> AsyncIterator[list[Server]]:
    servers: list[Server] = []
    yield servers
    for s in servers:
        await s.session.close()
        await s.server.close()


def _sample(text: str, name: str, **labels: str) -> float | None:
    """The value of one exposition sample whose labels include ``labels``."""
    for line in text.splitlines():
        match = re.fullmatch(rf"{name}\{{(.*)\}} (\S+)", line)
        if match and all(f'{k}="{v}"' in match.group(1) for k, v in labels.items()):
            return float(match.group(2))
    return None


async def test_responses_and_latencies_counted_per_route_method_and_status(
    tmp_path: Path, started: list[Server]
) -> None:
    api = await _serve(tmp_path)
    started.append(api)
    status, body, _ = await api.post("/api/models", _json(MODEL))
    assert status == 201, body
    good = _json({"events": [{"fields": {"title": "a b", "price": 3}}]})
    for _ in range(3):
        assert (await api.post(SCORE, good))[0] == 200
    for _ in range(2):
        assert (await api.post(SCORE, _json({"events": []})))[0] == 422
    assert (await api.post("/nowhere", good))[0] == 404
    text = await api.get_text("/metrics")
    route = {"route": "/api/models/{model}/score", "method": "POST"}
    assert _sample(text, "thresher_http_responses_total", status="200", **route) == 3.0
    assert _sample(text, "thresher_http_responses_total", status="422", **route) == 2.0
    assert _sample(text, "thresher_http_request_duration_seconds_count", **route) == 5.0
    assert _sample(text, "thresher_http_request_duration_seconds_bucket", le="+Inf", **route) == 5
    unmatched = {"route": "unmatched", "method": "POST", "status": "404"}
    assert _sample(text, "thresher_http_responses_total", **unmatched) == 1.0
    created = {"route": "/api/models", "method": "POST", "status": "201"}
    assert _sample(text, "thresher_http_responses_total", **created) == 1.0


async def test_in_flight_cap_answers_503_until_a_request_finishes(
    tmp_path: Path, started: list[Server]
) -> None:
    api = await _serve(tmp_path, max_inflight=1)
    started.append(api)
    assert (await api.post("/api/models", _json(MODEL)))[0] == 201
    good = _json({"events": [{"fields": {"title": "a b", "price": 3}}]})
    # The page's event stream is a request in progress for as long as it stays open.
    stream = await api.session.get(api.url("/api/events"))
    assert stream.status == 200
    status, problem, headers = await api.post(SCORE, good)
    assert status == 503 and problem["type"] == "/problems/unavailable"
    assert headers["Retry-After"] == "1"
    async with api.session.get(api.url("/healthz")) as resp:  # outside /api/: not capped
        assert resp.status == 200
    stream.close()
    deadline = time.monotonic() + 10
    while (status := (await api.post(SCORE, good))[0]) == 503 and time.monotonic() < deadline:
        await asyncio.sleep(0.1)
    assert status == 200


@pytest.mark.parametrize(
    ("raw", "status"),
    [
        (b"[" * 100_000 + b"]" * 100_000, 400),  # json's recursion limit: was an internal error
        (b'\xef\xbb\xbf{"events": [{"fields": {"price": 1}}]}', 200),  # a BOM json skips
        (b'{"events": [{"fields": {"code": "\\ud800"}}]}', 422),  # a lone surrogate: no UTF-8
        (b'{"events": [{"fields": {"title": "\\ud800 x"}}]}', 200),  # not a word: left out
    ],
)
async def test_bodies_json_reads_specially_keep_their_answers(
    tmp_path: Path, started: list[Server], raw: bytes, status: int
) -> None:
    api = await _serve(tmp_path)
    started.append(api)
    assert (await api.post("/api/models", _json(MODEL)))[0] == 201
    got, body, headers = await api.post(SCORE, raw)
    assert got == status, body
    if status != 200:
        assert headers["Content-Type"].startswith("application/problem+json")


async def test_an_integer_beyond_64_bits_scores_as_its_exact_text(
    tmp_path: Path, started: list[Server]
) -> None:
    api = await _serve(tmp_path)
    started.append(api)
    assert (await api.post("/api/models", _json(MODEL)))[0] == 201
    big = 123456789012345678901234567890
    # A categorical number's token is its text, so the model learns it from the string.
    labels = [{"label": "fraud", "fields": {"code": str(big)}}]
    status, body, _ = await api.post(
        "/api/models/m/labels", _json({"labels": labels, "source": "t"})
    )
    assert status == 200, body
    exact = (await api.post(SCORE, _json({"events": [{"fields": {"code": big}}], "explain": 5})))[1]
    assert exact["results"][0]["label"] == "fraud" and exact["results"][0]["margin"] > 0
    assert exact["results"][0]["explain"][0]["token"] == f"code={big}"


def _json(value: Any) -> bytes:
    import json

    return json.dumps(value).encode()
