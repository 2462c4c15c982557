"""Restore and rebuild with the Redis log when a replica lags, the stream is trimmed, or the
work is long.

Two thresher apps in this process share one real redis-server, so a test can hold one
replica's follower (a real lag: labels are still appended, its model stops at an offset) and
shorten the limits that a rebuild of a million labels would meet.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import time
from collections.abc import AsyncIterator, Iterator
from pathlib import Path
from typing import Any

import aiohttp
import pytest
from aiohttp import web
from aiohttp.test_utils import TestServer

from test_redis import (
    ROWS,
    RedisServer,
    call,
    converged,
    head_of,
    labels,
    model_body,
    ok,
    stream_key,
)
from test_redisswitch import flipped
from thresher import records, redisswitch
from thresher.http import MODELS, create_app
from thresher.redisfollow import SWITCHING
from thresher.settings import Settings

pytestmark = pytest.mark.redis


@pytest.fixture
def server(tmp_path: Path) -> Iterator[RedisServer]:
    running = RedisServer(tmp_path / "redis")
    running.start()
    try:
        yield running
    finally:
        running.stop()


@contextlib.asynccontextmanager
async def replica(
    server: RedisServer, data_dir: Path
) -> AsyncIterator[tuple[str, web.Application]]:
    """A thresher app on the Redis log, in this process; its base URL and app once ready."""
    settings = {"data_dir": str(data_dir), "log": server.url, "snapshot_interval": 0,
                "snapshot_every": 0}  # fmt: skip
    app = TestServer(create_app(Settings.from_mapping(settings)), host="127.0.0.1")
    await app.start_server()
    base = str(app.make_url("")).rstrip("/")
    try:
        async with aiohttp.ClientSession() as session:
            while (await call(session, "GET", f"{base}/readyz"))[0] != 200:
                await asyncio.sleep(0.05)
        yield base, app.app
    finally:
        await app.close()


@contextlib.asynccontextmanager
async def two_replicas(
    server: RedisServer, root: Path
) -> AsyncIterator[tuple[aiohttp.ClientSession, list[str], list[web.Application]]]:
    """Two replicas with model "lagged" created and adopted by both; a session to call them."""
    async with (
        replica(server, root / "a") as (a, a_app),
        replica(server, root / "b") as (b, b_app),
        aiohttp.ClientSession() as session,
    ):
        await ok(session, "POST", f"{a}/api/models", model_body("lagged"))
        await converged(session, [a, b], "lagged", 0)
        yield session, [a, b], [a_app, b_app]


def first_offset(server: RedisServer, model: str) -> int:
    """The offset of the stream's first entry, where trimming left it (the head if none)."""
    with server.client() as client:
        entry = client.xrange(stream_key(server, model), count=1)
    return int(entry[0][0].split(b"-")[1]) - 1 if entry else head_of(server, model)


def model_key(server: RedisServer, model: str, suffix: str) -> str:
    return stream_key(server, model).removesuffix("stream") + suffix


async def feed(session: aiohttp.ClientSession, url: str, items: list[dict[str, Any]]) -> None:
    """Labels in requests of 50, sources alternating by request: "good", then "bad"."""
    for k, i in enumerate(range(0, len(items), 50)):
        body = {"labels": items[i : i + 50], "source": ("good", "bad")[k % 2]}
        await ok(session, "POST", f"{url}/api/models/lagged/labels", body)


@pytest.mark.parametrize("covered", [False, True], ids=["no-snapshot-past-it", "snapshot-past-it"])
async def test_a_replica_lagging_behind_a_rebuild_from_nothing_survives_a_trim(
    server: RedisServer, tmp_path: Path, covered: bool
) -> None:
    async with two_replicas(server, tmp_path) as (session, [a, b], [_, b_app]):
        await feed(session, a, labels("g", ROWS[:200]))
        await converged(session, [a, b], "lagged", 200)

        registry = b_app[MODELS]
        lagging = registry.models["lagged"]
        lagging.hold()  # its follower stops at offset 200 while the stream grows
        try:
            await feed(session, a, labels("m", ROWS[200:300], 200))
            lock = model_key(server, "lagged", "snaplock")
            with server.client() as client:
                if not covered:  # another replica is writing one: no snapshot after the switch
                    client.set(lock, "another-replica", px=60_000)
                body = {"exclude_sources": ["bad"]}
                rebuilt = await ok(session, "POST", f"{a}/api/models/lagged/rebuild", body)
                client.delete(lock)
            assert rebuilt["offset"] == 301 and lagging.offset == 200
            # With a snapshot past the rebuild (the requester's) the stream is trimmed to it:
            # the lagging replica's next record is gone. Without one it holds every record.
            assert first_offset(server, "lagged") == (301 if covered else 0)
            # The lagging replica writes a snapshot where it stands (an operator's, or its
            # timer's): that would trim the stream to offset 200, but for what the rebuild
            # reads while no snapshot is past it.
            info = await registry.snapshot("lagged")
            assert info.offset == 200
            assert first_offset(server, "lagged") == (301 if covered else 0)
        finally:
            lagging.resume()
        summaries = await converged(session, [a, b], "lagged", 301)
        assert summaries[0]["weights_digest"] == summaries[1]["weights_digest"]
        assert summaries[0]["digest"] == summaries[1]["digest"]
        assert lagging.log.resyncs == (1 if covered else 0)
        async with session.get(f"{b}/metrics") as resp:
            metrics = await resp.text()
        assert f'thresher_replica_resyncs_total{{model="lagged"}} {float(covered)}' in metrics

        late = {"labels": labels("z", ROWS[300:320], 300), "source": "good", "wait": True}
        assert (await ok(session, "POST", f"{b}/api/models/lagged/labels", late))["applied"] == 20
        summaries = await converged(session, [a, b], "lagged", 321)
        assert summaries[0]["weights_digest"] == summaries[1]["weights_digest"]
        # A snapshot past the rebuild releases the records it held back, down to the oldest
        # snapshot kept (the lagging replica's at 200; retain 0).
        assert (await registry.snapshot("lagged")).offset == 321
        assert first_offset(server, "lagged") == (301 if covered else 200)
        with server.client() as client:
            assert client.hlen(model_key(server, "lagged", "rebuilds")) == 0


@pytest.mark.parametrize("behind", [False, True], ids=["record-read", "labels-before-it"])
async def test_a_replica_not_yet_switched_refuses_labels_instead_of_answering_from_old_ids(
    server: RedisServer, tmp_path: Path, behind: bool
) -> None:
    async with two_replicas(server, tmp_path) as (session, [a, b], [_, b_app]):
        first, later = labels("r", ROWS[:100]), labels("r", ROWS[100:150], 100)
        await feed(session, a, first)
        snap = await ok(session, "POST", f"{a}/api/models/lagged/snapshots")
        await feed(session, a, later)
        await converged(session, [a, b], "lagged", 150)

        lagging = b_app[MODELS].models["lagged"]
        lagging.hold()  # its follower stops before applying what it reads next
        head = 151
        try:
            if behind:  # it reads these and waits on them: the restore stays unread
                await feed(session, a, labels("x", ROWS[150:250], 150))
                await asyncio.sleep(0.3)
                head = 251
            path = f"{a}/api/models/lagged/snapshots/{snap['generation']}/restore"
            assert (await ok(session, "POST", path))["offset"] == head
            if behind:
                assert lagging.frozen is None
                await lagging.log._refresh_head(lagging)  # as its follower does every 0.25 s
            deadline = time.monotonic() + 10
            while lagging.frozen != SWITCHING:
                assert time.monotonic() < deadline, "the follower never read the restore"
                await asyncio.sleep(0.01)
            # Both ids were rolled back; the replica's own index still holds them, so it must
            # not call the first a conflict nor drop the second as a duplicate.
            for item in (flipped(later[0]), later[1]):
                body = {"labels": [item], "source": "fix"}
                status, problem, headers = await call(
                    session, "POST", f"{b}/api/models/lagged/labels", body
                )
                assert status == 503 and "Retry-After" in headers, (status, problem)
                assert "switching" in problem["detail"]
        finally:
            lagging.resume()
        await converged(session, [a, b], "lagged", head)
        assert lagging.frozen is None
        body = {"labels": [flipped(later[0]), later[1]], "source": "fix", "wait": True}
        ack = await ok(session, "POST", f"{b}/api/models/lagged/labels", body)
        assert (ack["applied"], ack["duplicates"]) == (2, 0)
        summaries = await converged(session, [a, b], "lagged", head + 2)
        assert summaries[0]["weights_digest"] == summaries[1]["weights_digest"]


async def test_a_rebuild_longer_than_the_freeze_and_the_answer_timeout_completes(
    server: RedisServer,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    caplog: pytest.LogCaptureFixture,
) -> None:
    # The limits a million labels would outlast, shortened below what 60,000 take here: the
    # preparation (under the freeze) and the relearning (before the answer) each take longer.
    monkeypatch.setattr(redisswitch, "FREEZE_MS", 300)
    monkeypatch.setattr(redisswitch, "APPLY_TIMEOUT", 0.3)
    monkeypatch.setattr(redisswitch, "REPLAY", 512)  # progress shows every 512 labels
    caplog.set_level(logging.INFO, logger="thresher.redis")
    n = 60_000
    async with two_replicas(server, tmp_path) as (session, [a, b], [a_app, _]):
        # Appended as label requests append them (rows made by the model's featurizer), but
        # straight to the stream: HTTP would only make the test slower.
        model = a_app[MODELS].models["lagged"]
        pack = records.fields_packer()
        for start in range(0, n, 10_000):
            rows = [ROWS[i % len(ROWS)] for i in range(start, start + 10_000)]
            source = ("good", "bad")[start // 10_000 % 2]
            recs = [
                {"id": f"n{start + k}", "label": r["label"], "source": source, "served": None,
                 "time": 1.0, "packed": pack(r["fields"])}
                for k, r in enumerate(rows)
            ]  # fmt: skip
            batch = model.featurizer.transform_batch([r["fields"] for r in rows])
            payloads = records.encode_many(recs, model.row_key, batch, range(len(recs)))
            keys = [(r["id"], r["label"], source) for r in recs]
            for i in range(0, len(payloads), 1000):
                await model.log.admit(payloads[i : i + 1000], keys[i : i + 1000])
        await converged(session, [a, b], "lagged", n, timeout=60)

        body = {"exclude_sources": ["bad"]}
        status, rebuilt, _ = await call(session, "POST", f"{a}/api/models/lagged/rebuild", body)
        assert status == 200, rebuilt
        assert (rebuilt["offset"], rebuilt["labelled"]) == (n + 1, n // 2)
        assert any("freeze renewals" in r.getMessage() for r in caplog.records)
        summaries = await converged(session, [a, b], "lagged", n + 1, timeout=60)
        assert {s["weights_digest"] for s in summaries} == {rebuilt["weights_digest"]}
        # The ids the rebuild left: "bad" ones are open again, "good" ones are not.
        again = [{"id": f"n{k}", **ROWS[k % len(ROWS)]} for k in (10_000, 0)]
        body = {"labels": again, "source": "good", "wait": True}
        ack = await ok(session, "POST", f"{b}/api/models/lagged/labels", body)
        assert (ack["applied"], ack["duplicates"]) == (1, 1)


async def test_a_freeze_lapses_when_its_preparation_stalls_and_is_kept_while_it_progresses(
    server: RedisServer, monkeypatch: pytest.MonkeyPatch
) -> None:
    from thresher.redisstate import RedisState

    monkeypatch.setattr(redisswitch, "FREEZE_MS", 150)
    state = RedisState(server.url)
    try:
        token = await state.define("frozen", {"name": "frozen"})
        log = await state.open_log("frozen", token)
        freeze = redisswitch.Freeze(log, "mark")
        await state.client.set(log.keys.freeze, "mark", px=150)
        keeper = asyncio.get_running_loop().create_task(freeze.keep())
        try:
            for _ in range(8):  # 0.4 s of progress, past two expiries
                freeze.tick()
                await asyncio.sleep(0.05)
            assert await state.client.get(log.keys.freeze) == b"mark"
            await asyncio.sleep(0.4)  # no progress: it lapses within two periods
            assert await state.client.get(log.keys.freeze) is None
        finally:
            keeper.cancel()
        await state.undefine("frozen", token)
    finally:
        await state.close()
