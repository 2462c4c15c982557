"""The Python client over real sockets.

Retry, error and batching behaviour is checked against small real HTTP servers started here
(aiohttp apps, and a raw asyncio server that hangs up mid-request). The rest runs against a
real thresher server from ``thresher.http.create_app`` on a free loopback port, fed with the
invented demo traffic. Retry-After parsing follows RFC 9110 section 10.2.3.
"""

from __future__ import annotations

import asyncio
import json
import random
import re
from collections.abc import AsyncIterator, Awaitable, Callable
from pathlib import Path
from typing import Any

import aiohttp
import pytest
from aiohttp import web
from aiohttp.test_utils import TestServer

from conftest import free_port
from thresher.demo_traffic import DEMO_MODEL, DEMO_SPEC, ListingTraffic
from thresher_client import (
    AsyncClient,
    Batcher,
    Client,
    Event,
    ExplainItem,
    Label,
    RetryPolicy,
    ScoreResult,
    ThresherAPIError,
    ThresherConnectionError,
)
from thresher_client.retry import parse_retry_after

Start = Callable[[web.Application], Awaitable[str]]


def problem(status: int, slug: str, detail: str, **extra: Any) -> web.Response:
    headers = {}
    if "retry_after" in extra:
        headers["Retry-After"] = str(extra.pop("retry_after"))
    body = {"type": f"/problems/{slug}", "title": slug, "status": status, "detail": detail}
    body.update(extra)
    return web.Response(
        text=json.dumps(body),
        status=status,
        headers=headers,
        content_type="application/problem+json",
    )


HITS = web.AppKey("hits", list)


def counting_app(
    method: str, path: str, handler: Callable[[int, web.Request], Any]
) -> web.Application:
    """One route whose handler also gets the 1-based number of the hit."""
    hits = [0]

    async def route(request: web.Request) -> web.StreamResponse:
        hits[0] += 1
        result = handler(hits[0], request)
        return await result if asyncio.iscoroutine(result) else result

    app = web.Application()
    app.router.add_route(method, path, route)
    app[HITS] = hits
    return app


@pytest.fixture
async def serve() -> AsyncIterator[Start]:
    servers: list[TestServer] = []

    async def start(app: web.Application) -> str:
        server = TestServer(app, host="127.0.0.1")
        await server.start_server()
        servers.append(server)
        return str(server.make_url("")).rstrip("/")

    yield start
    for server in servers:
        await server.close()


class HangUp:
    """A raw TCP server: reads each HTTP request, then hangs up or answers, from a script."""

    def __init__(self, script: list[dict[str, Any] | None]) -> None:
        self.script = script
        self.requests: list[bytes] = []
        self.server: asyncio.Server | None = None

    async def __aenter__(self) -> str:
        self.server = await asyncio.start_server(self._handle, "127.0.0.1", 0)
        return f"http://127.0.0.1:{self.server.sockets[0].getsockname()[1]}"

    async def __aexit__(self, *exc: object) -> None:
        assert self.server is not None
        self.server.close()
        await self.server.wait_closed()

    async def _handle(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        head = await reader.readuntil(b"\r\n\r\n")
        length = 0
        for line in head.split(b"\r\n"):
            if line.lower().startswith(b"content-length:"):
                length = int(line.split(b":", 1)[1])
        self.requests.append(head + await reader.readexactly(length))
        answer = self.script.pop(0) if self.script else None
        if answer is not None:
            payload = json.dumps(answer).encode()
            writer.write(
                b"HTTP/1.1 200 OK\r\nContent-Type: application/json\r\n"
                b"Connection: close\r\nContent-Length: %d\r\n\r\n%s" % (len(payload), payload)
            )
            await writer.drain()
        writer.close()  # with no answer written, the client sees the server hang up


ACK = {"applied": 2, "duplicates": 0, "mistakes": 1, "offset": 2}
NO_IDS = [Label("fraud", fields={"title": "x"}), Label("fine", fields={"title": "y"})]
WITH_IDS = [Label("fraud", id="a"), Label("fine", id="b")]


# -- retries against small real servers ----------------------------------------------------


async def test_503_is_retried_and_retry_after_is_honoured(serve: Start) -> None:
    def handler(hit: int, _: web.Request) -> web.Response:
        if hit <= 2:
            return problem(503, "unavailable", "recovering", retry_after=1)
        return web.json_response({"models": []})

    app = counting_app("GET", "/api/models", handler)
    url = await serve(app)
    loop = asyncio.get_running_loop()
    async with AsyncClient(url, backoff=0.01, max_backoff=0.02, rng=random.Random(1)) as client:
        started = loop.time()
        assert await client.models() == []
        elapsed = loop.time() - started
    assert app[HITS][0] == 3
    assert elapsed >= 1.95  # two Retry-After: 1 waits; the backoff alone is ~0.03 s


async def test_429_retries_run_out_into_the_api_error(serve: Start) -> None:
    app = counting_app(
        "POST",
        "/api/models/m/labels",
        lambda hit, _: problem(429, "rate-limited", "over the cap", retry_after=0),
    )
    url = await serve(app)
    async with AsyncClient(url, retries=3, backoff=0.001) as client:
        with pytest.raises(ThresherAPIError) as caught:
            await client.label("m", NO_IDS, source="queue")
    assert app[HITS][0] == 4
    error = caught.value
    assert (error.status, error.slug, error.retry_after) == (429, "rate-limited", 0.0)


@pytest.mark.parametrize("status", [400, 401, 404, 409, 413, 422])
async def test_other_client_errors_are_never_retried(serve: Start, status: int) -> None:
    app = counting_app(
        "POST",
        "/api/models/m/score",
        lambda hit, _: problem(
            status, "invalid-event", "price must be a number", path="events[3].fields.price"
        ),
    )
    url = await serve(app)
    async with AsyncClient(url, backoff=0.001) as client:
        with pytest.raises(ThresherAPIError) as caught:
            await client.score("m", [{"fields": {"price": "x"}}])
    assert app[HITS][0] == 1
    error = caught.value
    assert error.status == status and error.type == "/problems/invalid-event"
    assert error.path == "events[3].fields.price" and error.detail == "price must be a number"
    assert isinstance(error.body, dict) and error.body["status"] == status
    assert "events[3].fields.price: price must be a number" in str(error)


async def test_a_non_json_error_body_still_reads_well(serve: Start) -> None:
    app = counting_app(
        "GET",
        "/api/models/m",
        lambda hit, _: web.Response(
            status=502,
            text="<html><body>\n  upstream  went away\n</body></html>",
            content_type="text/html",
        ),
    )
    url = await serve(app)
    async with AsyncClient(url, backoff=0.001) as client:
        with pytest.raises(ThresherAPIError) as caught:
            await client.model("m")
    assert app[HITS][0] == 1  # only 503 and 429 are retried
    assert caught.value.status == 502 and caught.value.title == "Bad Gateway"
    assert "upstream went away" in caught.value.detail
    assert str(caught.value).startswith("502 Bad Gateway: <html>")


async def test_connection_refused_is_retried_then_raised() -> None:
    url = f"http://127.0.0.1:{free_port()}"  # nothing listens there
    loop = asyncio.get_running_loop()
    async with AsyncClient(url, retries=3, backoff=0.05, rng=random.Random(0)) as client:
        started = loop.time()
        with pytest.raises(ThresherConnectionError) as caught:
            await client.models()
        elapsed = loop.time() - started
        assert await client.ready() is False
    assert caught.value.attempts == 4
    assert elapsed >= 0.5 * 0.05 * (1 + 2 + 4)  # the shortest jittered waits


async def test_labels_without_ids_are_not_resent_after_a_hang_up() -> None:
    hang_up = HangUp([None, ACK])
    async with hang_up as url, AsyncClient(url, backoff=0.001) as client:
        with pytest.raises(ThresherConnectionError, match="not retried"):
            await client.label("m", NO_IDS, source="queue")
    assert len(hang_up.requests) == 1


async def test_labels_with_ids_and_scores_are_resent_after_a_hang_up() -> None:
    hang_up = HangUp([None, ACK, None, {"results": [{"id": "a", "label": "b", "margin": 1}]}])
    async with hang_up as url, AsyncClient(url, backoff=0.001) as client:
        ack = await client.label("m", WITH_IDS, source="queue")
        [result] = await client.score("m", [Event({"t": "x"}, id="a")])
    assert (ack.applied, ack.mistakes, ack.offset) == (2, 1, 2)
    assert result == ScoreResult(id="a", label="b", margin=1.0)
    assert len(hang_up.requests) == 4
    assert (
        hang_up.requests[0].split(b"\r\n\r\n", 1)[1] == hang_up.requests[1].split(b"\r\n\r\n", 1)[1]
    )


async def test_creating_a_model_is_not_resent_after_a_hang_up() -> None:
    hang_up = HangUp([None, {"name": "m", "classes": ["a", "b"]}])
    async with hang_up as url, AsyncClient(url, backoff=0.001) as client:
        with pytest.raises(ThresherConnectionError):
            await client.create_model("m", ["a", "b"])
    assert len(hang_up.requests) == 1


@pytest.mark.parametrize(("wait", "hits"), [(False, 2), (True, 1)])
async def test_labels_without_ids_on_503(serve: Start, wait: bool, hits: int) -> None:
    def handler(hit: int, _: web.Request) -> web.Response:
        if hit == 1:
            return problem(503, "log-unavailable", "disk full", retry_after=0)
        return web.json_response(ACK)

    app = counting_app("POST", "/api/models/m/labels", handler)
    url = await serve(app)
    async with AsyncClient(url, backoff=0.001) as client:
        if wait:  # 503 may follow the durable append under wait=true, so no resend
            with pytest.raises(ThresherAPIError, match="disk full"):
                await client.label("m", NO_IDS, source="queue", wait=True)
        else:
            assert (await client.label("m", NO_IDS, source="queue")).applied == 2
    assert app[HITS][0] == hits


async def test_a_timed_out_read_is_retried(serve: Start) -> None:
    async def handler(hit: int, _: web.Request) -> web.Response:
        if hit == 1:
            await asyncio.sleep(1.0)
        return web.json_response(
            {"snapshots": [{"generation": 4, "offset": 9, "time": 1.5, "bytes": 100}]}
        )

    app = counting_app("GET", "/api/models/m/snapshots", handler)
    url = await serve(app)
    async with AsyncClient(url, timeout=0.2, backoff=0.001) as client:
        [info] = await client.snapshots("m")
    assert (info.generation, info.offset, info.time, info.bytes) == (4, 9, 1.5, 100)
    assert app[HITS][0] == 2


def test_retry_policy_waits() -> None:
    policy = RetryPolicy(5, 0.1, 1.0, rng=random.Random(42))
    waits = [policy.delay(k) for k in range(6)]
    for k, wait in enumerate(waits):
        base = min(1.0, 0.1 * 2**k)
        assert 0.5 * base <= wait < base
    again = RetryPolicy(5, 0.1, 1.0, rng=random.Random(42))
    assert [again.delay(k) for k in range(6)] == waits
    assert policy.delay(0, retry_after=2.0) >= 2.0
    assert policy.delay(0, retry_after=3600.0) == 60.0  # capped, see retry.MAX_RETRY_AFTER
    with pytest.raises(ValueError, match="retries"):
        RetryPolicy(-1)


def test_retry_after_values() -> None:
    assert parse_retry_after("120") == 120.0
    # RFC 9110's own example date; 946684799 is its Unix time (from memory).
    assert parse_retry_after("Fri, 31 Dec 1999 23:59:59 GMT", now=946684799 - 30) == 30.0
    assert parse_retry_after("Fri, 31 Dec 1999 23:59:59 GMT", now=946684799 + 30) == 0.0
    assert parse_retry_after("soon") is None and parse_retry_after(None) is None


async def test_token_body_and_answer_shapes(serve: Start) -> None:
    seen: list[tuple[str | None, Any]] = []

    async def handler(hit: int, request: web.Request) -> web.Response:
        seen.append((request.headers.get("Authorization"), await request.json()))
        return web.json_response(
            {
                "results": [
                    {
                        "id": "e1",
                        "label": "b",
                        "margin": 0.5,
                        "explain": [
                            {"token": "t:x", "weight": 0.5, "value": 1.0, "contribution": 0.5}
                        ],
                    },
                    {"id": None, "label": "c", "margin": 2.0, "margins": {"a": -1, "b": 0, "c": 2}},
                ]
            }
        )

    url = await serve(counting_app("POST", "/api/models/m/score", handler))
    async with AsyncClient(url + "/", token="s3cret") as client:
        first, second = await client.score(
            "m", [Event({"t": "x"}, id="e1"), {"fields": {"t": "y"}}], explain=2
        )
        with pytest.raises(ValueError, match="cannot be sent as JSON"):
            await client.score("m", [{"fields": {"price": float("nan")}}])
        with pytest.raises(TypeError, match=r"events\[1\]"):
            await client.score("m", [{"fields": {}}, "not an event"])  # type: ignore[list-item]
    assert seen == [
        (
            "Bearer s3cret",
            {"events": [{"fields": {"t": "x"}, "id": "e1"}, {"fields": {"t": "y"}}], "explain": 2},
        )
    ]
    assert first.explain == (ExplainItem("t:x", 0.5, 1.0, 0.5),) and first.margins is None
    assert second.margins == {"a": -1.0, "b": 0.0, "c": 2.0} and second.id is None


async def test_sync_client_from_a_thread(serve: Start) -> None:
    def handler(hit: int, request: web.Request) -> web.Response:
        if hit == 1:
            return problem(503, "unavailable", "busy", retry_after=0)
        return web.json_response({"results": [{"id": "s1", "label": "fine", "margin": -0.2}]})

    app = counting_app("POST", "/api/models/m/score", handler)
    url = await serve(app)

    def blocking() -> list[ScoreResult]:
        with Client(url, backoff=0.001) as client:
            results = client.score("m", [Event({"t": "x"}, id="s1")])
        with pytest.raises(RuntimeError, match="closed"):
            client.models()
        return results

    # The server answers on this loop, so the blocking client must run in another thread.
    [result] = await asyncio.to_thread(blocking)
    assert result.label == "fine" and app[HITS][0] == 2


async def test_batcher_sends_by_size_and_by_time(serve: Start) -> None:
    sizes: list[int] = []

    async def handler(hit: int, request: web.Request) -> web.Response:
        events = (await request.json())["events"]
        sizes.append(len(events))
        return web.json_response(
            {
                "results": [
                    {"id": e.get("id"), "label": "fine", "margin": float(i)}
                    for i, e in enumerate(events)
                ]
            }
        )

    url = await serve(counting_app("POST", "/api/models/m/score", handler))
    async with AsyncClient(url) as client:
        batcher = Batcher(client, "m", kind="score", max_size=4, max_delay=0.1)
        futures = [await batcher.add(Event({"n": i}, id=f"e{i}")) for i in range(10)]
        assert sizes == [4, 4] and len(batcher) == 2
        assert all(f.done() for f in futures[:8]) and not futures[9].done()
        await asyncio.sleep(0.4)  # the timer sends the last two without a flush
        assert sizes == [4, 4, 2] and futures[9].done()
        assert [f.result().id for f in futures] == [f"e{i}" for i in range(10)]
        await batcher.close()
        with pytest.raises(RuntimeError, match="closed"):
            await batcher.add(Event({"n": 0}))
        with pytest.raises(ValueError, match="source"):
            Batcher(client, "m", kind="labels")


# -- against a real thresher server --------------------------------------------------------


@pytest.fixture
async def thresher_url(tmp_path: Path) -> AsyncIterator[str]:
    # Imported here so the tests above run while the server side is still being built.
    from thresher.http import create_app
    from thresher.settings import Settings

    settings = Settings.from_mapping({"data_dir": str(tmp_path / "data"), "snapshot_interval": 0})
    server = TestServer(create_app(settings), host="127.0.0.1")
    await server.start_server()
    yield str(server.make_url("")).rstrip("/")
    await server.close()


@pytest.fixture
async def client(thresher_url: str) -> AsyncIterator[AsyncClient]:
    async with AsyncClient(thresher_url, backoff=0.01) as c:
        await c.wait_ready(timeout=20)
        yield c


async def create_demo(client: AsyncClient, name: str = "listings") -> None:
    options = {k: v for k, v in DEMO_MODEL.items() if k not in ("name", "classes")}
    info = await client.create_model(name, DEMO_MODEL["classes"], **options)
    assert (info.name, info.classes, info.bits, info.rule) == (
        name,
        ("fine", "fraud"),
        20,
        "averaged",
    )


async def test_models_score_label_quality(client: AsyncClient) -> None:
    await create_demo(client)
    assert [m.name for m in await client.models()] == ["listings"]
    assert (await client.model("listings")).snapshot is None
    with pytest.raises(ThresherAPIError) as caught:
        await create_demo(client)
    assert caught.value.status == 409 and caught.value.slug == "conflict"
    traffic = ListingTraffic(seed=3).batch(300)
    results = await client.score("listings", [Event(f, id=i) for i, f, _ in traffic], explain=3)
    assert [r.id for r in results] == [i for i, _, _ in traffic]
    assert {r.label for r in results} <= {"fine", "fraud"}
    assert all(len(r.explain) <= 3 for r in results)  # untrained: little or nothing to show
    ack = await client.label(
        "listings", [Label(y, id=i) for i, _, y in traffic], source="review-queue"
    )
    assert (ack.applied, ack.duplicates, ack.offset) == (300, 0, 300)
    assert ack.mistakes is not None and 0 < ack.mistakes < 150
    # The same ids again: applied once already, so the server counts them as duplicates.
    again = await client.label(
        "listings", [{"id": i, "label": y} for i, _, y in traffic], source="review-queue"
    )
    assert (again.applied, again.duplicates) == (0, 300)
    rescored = await client.score("listings", [Event(f) for _, f, _ in traffic[:20]], explain=3)
    for result in rescored:
        assert 1 <= len(result.explain) <= 3
        for item in result.explain:
            assert item.contribution == pytest.approx(item.weight * item.value)
            # Every token names a field of the spec (a cross names its first field), or is bias.
            assert (
                item.token == "^bias" or re.split(r"[:=@#]", item.token)[0] in DEMO_SPEC["fields"]
            )
    quality = await client.quality("listings")
    assert (quality.model, quality.labelled, quality.mistakes) == ("listings", 300, ack.mistakes)
    assert len(quality.recent_mistakes) > 0 and quality.raw["labelled"] == 300
    with pytest.raises(ThresherAPIError) as caught:
        await client.score("listings", [{"fields": "not an object"}])
    assert caught.value.status == 422 and caught.value.path == "events[0].fields"
    await client.delete_model("listings")
    with pytest.raises(ThresherAPIError) as caught:
        await client.model("listings")
    assert caught.value.status == 404


async def test_a_lost_label_answer_is_resent_and_deduplicated(
    client: AsyncClient, thresher_url: str, serve: Start
) -> None:
    await create_demo(client)
    drops = [1]
    upstream = aiohttp.ClientSession()

    async def relay(request: web.Request) -> web.StreamResponse:
        async with upstream.request(
            request.method,
            thresher_url + request.path_qs,
            data=await request.read(),
            headers={"Content-Type": "application/json"},
        ) as resp:
            payload, status = await resp.read(), resp.status
        if request.path.endswith("/labels") and drops[0]:
            drops[0] -= 1
            assert request.transport is not None
            request.transport.close()  # the labels were applied; the answer is lost
        return web.Response(body=payload, status=status, content_type="application/json")

    app = web.Application()
    app.router.add_route("*", "/{tail:.*}", relay)
    url = await serve(app)
    traffic = ListingTraffic(seed=4).batch(50)
    try:
        async with AsyncClient(url, backoff=0.01) as via_relay:
            ack = await via_relay.label(
                "listings", [Label(y, id=i, fields=f) for i, f, y in traffic], source="import"
            )
    finally:
        await upstream.close()
    assert drops == [0]
    assert (ack.applied, ack.duplicates) == (0, 50)  # the resend found every id applied
    assert (await client.model("listings")).labelled == 50


async def test_snapshot_restore_and_rebuild(client: AsyncClient) -> None:
    await create_demo(client)
    traffic = ListingTraffic(seed=5).batch(500)
    good = [Label(y, id=i, fields=f) for i, f, y in traffic[:400]]
    await client.label("listings", good, source="review-queue")
    snap = await client.take_snapshot("listings")
    assert snap.offset == 400 and snap.bytes > 0
    assert snap in await client.snapshots("listings")
    kept = (await client.model("listings")).raw["weights_digest"]
    # A poisoned feed without ids: every label flipped.
    flipped = [Label("fine" if y == "fraud" else "fraud", fields=f) for _, f, y in traffic[400:]]
    await client.label("listings", flipped, source="bulk-import")
    assert (await client.model("listings")).raw["weights_digest"] != kept
    restored = await client.restore_snapshot("listings", snap.generation)
    assert restored.raw["weights_digest"] == kept and restored.labelled == 400
    rebuilt = await client.rebuild("listings", exclude_sources=["bulk-import"])
    assert rebuilt.raw["weights_digest"] == kept and rebuilt.offset == 500
    with pytest.raises(ThresherAPIError) as caught:
        await client.restore_snapshot("listings", 999)
    assert caught.value.status == 404


async def test_sync_client_against_the_server(thresher_url: str) -> None:
    def blocking() -> tuple[int, int]:
        with Client(thresher_url, backoff=0.01) as sync:
            sync.wait_ready(20)
            sync.create_model("sync-listings", ["fine", "fraud"], features=DEMO_SPEC, bits=16)
            traffic = ListingTraffic(seed=6).batch(40)
            scored = sync.score("sync-listings", [Event(f, id=i) for i, f, _ in traffic])
            ack = sync.label(
                "sync-listings",
                [Label(y, id=i) for i, _, y in traffic],
                source="review-queue",
                wait=True,
            )
            assert sync.quality("sync-listings").labelled == 40
            return len(scored), ack.applied

    assert await asyncio.to_thread(blocking) == (40, 40)


async def test_batchers_against_the_server(client: AsyncClient) -> None:
    await create_demo(client)
    traffic = ListingTraffic(seed=7).batch(130)
    async with Batcher(client, "listings", kind="score", max_size=50, max_delay=0.05) as scorer:
        scored = [await scorer.add(Event(f, id=i)) for i, f, _ in traffic]
    assert scorer.requests == 3
    assert [f.result().id for f in scored] == [i for i, _, _ in traffic]
    async with Batcher(client, "listings", source="review-queue", max_size=64) as labeller:
        acks = [await labeller.add(Label(y, id=i)) for i, _, y in traffic]
        await labeller.flush()  # so the bad label below travels alone
        bad = await labeller.add(Label("maybe", id="lst-999999", fields={"title": "x"}))
    assert labeller.requests == 4 and labeller.failures == 1
    assert sum({id(f.result()): f.result().applied for f in acks}.values()) == 130
    with pytest.raises(ThresherAPIError) as caught:
        bad.result()
    assert caught.value.status == 422 and caught.value.path == "labels[0].label"
