"""Restore and rebuild with the Redis log: a control record switches every replica at one offset.

Real processes as in test_redis: a Debian redis-server and ``thresher serve --log redis://...``
replicas. The reference for "same state" is a file-log server doing the same labels, snapshot,
restore or rebuild in the order the stream holds them.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
from collections.abc import AsyncIterator, Iterator
from pathlib import Path
from typing import Any

import aiohttp
import msgpack
import pytest
import redis
from aiohttp.test_utils import TestServer

from test_redis import (
    CLASSES,
    ROWS,
    RedisServer,
    Replica,
    call,
    converged,
    head_of,
    labels,
    model_body,
    ok,
    stream_key,
    three_replicas,
)
from thresher import records
from thresher.http import create_app
from thresher.settings import Settings

pytestmark = pytest.mark.redis


def flipped(item: dict[str, Any]) -> dict[str, Any]:
    return {**item, "label": CLASSES[1 - CLASSES.index(item["label"])]}


def entries(server: RedisServer, model: str) -> list[tuple[int, dict[str, Any]]]:
    """(offset, label record or control record) in stream order, read straight from Redis."""
    with server.client() as client:
        raw = client.xrange(stream_key(server, model))
    out = []
    for entry_id, data in raw:
        record = records.decode(data[b"d"]) if b"d" in data else msgpack.unpackb(data[b"c"])
        out.append((int(entry_id.split(b"-")[1]) - 1, record))
    return out


def drop_snapshots_from(server: RedisServer, model: str, offset: int) -> int:
    """Delete the snapshots at or past ``offset``, as if nobody had written them yet."""
    base = stream_key(server, model).removesuffix("stream")
    dropped = 0
    with server.client() as client:
        for generation, packed in client.hgetall(base + "snaps").items():
            meta = msgpack.unpackb(packed)
            if meta["offset"] >= offset:
                client.hdel(base + "snaps", generation)
                client.delete(*(f"{base}snap:{int(generation)}:{i}" for i in range(meta["chunks"])))
                dropped += 1
    return dropped


@contextlib.asynccontextmanager
async def embedded(settings: dict[str, Any]) -> AsyncIterator[str]:
    """A thresher app in this process on a loopback port; its base URL once ready."""
    server = TestServer(create_app(Settings.from_mapping(settings)), host="127.0.0.1")
    await server.start_server()
    base = str(server.make_url("")).rstrip("/")
    try:
        async with aiohttp.ClientSession() as session:
            while (await call(session, "GET", f"{base}/readyz"))[0] != 200:
                await asyncio.sleep(0.05)
        yield base
    finally:
        await server.close()


async def replay_labels(
    session: aiohttp.ClientSession, url: str, model: str, records: list[dict[str, Any]]
) -> None:
    """Send label records one request each, which keeps their order exactly."""
    for r in records:
        body = {
            "labels": [{"id": r["id"], "label": r["label"], "fields": r["fields"]}],
            "source": r["source"],
        }
        await ok(session, "POST", f"{url}/api/models/{model}/labels", body)


@pytest.fixture(scope="module")
def switched(
    tmp_path_factory: pytest.TempPathFactory,
) -> Iterator[tuple[RedisServer, list[Replica]]]:
    """One Redis and three replicas; a large --log-retain keeps every record in the streams."""
    quiet = {"snapshot_interval": 0, "snapshot_every": 0, "log_retain": 1_000_000}
    with three_replicas(tmp_path_factory.mktemp("switched"), **quiet) as running:
        yield running


async def test_rebuild_without_a_source_switches_every_replica(
    switched: tuple[RedisServer, list[Replica]], tmp_path: Path
) -> None:
    server, replicas = switched
    urls = [r.url for r in replicas]
    good = labels("good", ROWS[:300])
    bad = [flipped(x) for x in labels("bad", ROWS[300:450], 300)]  # a feed that lies
    async with aiohttp.ClientSession() as session:
        await ok(session, "POST", f"{urls[0]}/api/models", model_body("poisoned"))
        await converged(session, urls, "poisoned", 0)

        async def feed(k: int, items: list[dict[str, Any]], source: str) -> None:
            for i in range(0, len(items), 10):
                body = {"labels": items[i : i + 10], "source": source}
                await ok(session, "POST", f"{urls[k]}/api/models/poisoned/labels", body)

        await asyncio.gather(
            *(feed(k, good[k::3], "good") for k in range(3)),
            *(feed((k + 1) % 3, bad[k::3], "bad") for k in range(3)),
        )
        head = head_of(server, "poisoned")
        poisoned = await converged(session, urls, "poisoned", head)
        sources = [r["source"] for _, r in entries(server, "poisoned")]
        assert "bad" in sources[: len(sources) // 2] and "good" in sources[len(sources) // 2 :]

        replicas[2].kill()  # misses the rebuild; restarted below, it must apply it from Redis
        status, rebuilt, _ = await call(
            session, "POST", f"{urls[0]}/api/models/poisoned/rebuild", {"exclude_sources": ["bad"]}
        )
        assert status == 200, rebuilt
        assert (rebuilt["offset"], rebuilt["labelled"]) == (head + 1, len(good))
        assert rebuilt["excluded_sources"] == ["bad"]
        assert rebuilt["weights_digest"] != poisoned[0]["weights_digest"]
        control = entries(server, "poisoned")[-1]
        assert control == (
            head,
            {"control": "rebuild", "generation": None, "exclude_sources": ["bad"]},
        )
        # The requester wrote a snapshot past the switch; without it a restart replays it.
        assert drop_snapshots_from(server, "poisoned", head + 1) == 1
        replicas[2].start()
        await asyncio.to_thread(replicas[2].wait_ready_blocking)
        await converged(session, urls, "poisoned", head + 1)

        # After the switch, on the replicas and on a file-log server doing the same:
        after = [
            (1, {"labels": [labels("bad", ROWS[300:301], 300)[0]], "source": "good"}),
            (2, {"labels": labels("late", ROWS[450:452], 450), "source": "bad"}),
            (0, {"labels": labels("late", ROWS[450:452], 450), "source": "good"}),
            (1, {"labels": [flipped(good[0])], "source": "bad"}),
            (2, {"labels": [good[1]], "source": "good"}),
        ]
        answers = []
        for k, body in after:
            status, data, _ = await call(
                session, "POST", f"{urls[k]}/api/models/poisoned/labels", {**body, "wait": True}
            )
            answers.append((status, data.get("applied"), data.get("duplicates"), data.get("path")))
        summaries = await converged(session, urls, "poisoned", head_of(server, "poisoned"))

        kept = [r for _, r in entries(server, "poisoned")[:head] if r["source"] == "good"]
        async with embedded({"data_dir": str(tmp_path / "ref"), "snapshot_interval": 0}) as ref:
            await ok(session, "POST", f"{ref}/api/models", model_body("poisoned"))
            await replay_labels(session, ref, "poisoned", kept)
            fresh = await ok(session, "GET", f"{ref}/api/models/poisoned")
            await ok(
                session, "POST", f"{ref}/api/models/poisoned/rebuild", {"exclude_sources": ["bad"]}
            )
            expected = []
            for _, body in after:
                status, data, _ = await call(
                    session, "POST", f"{ref}/api/models/poisoned/labels", body
                )
                expected.append(
                    (status, data.get("applied"), data.get("duplicates"), data.get("path"))
                )
            reference = await ok(session, "GET", f"{ref}/api/models/poisoned")
    assert rebuilt["digest"] == fresh["digest"]  # the good labels alone, in stream order
    assert rebuilt["weights_digest"] == fresh["weights_digest"]
    # A rolled-back id is open again; later "bad" labels are appended but never learned, and
    # leave their ids open; a "bad" relabel of a good id is still a conflict.
    assert (
        answers
        == expected
        == [
            (200, 1, 0, None),
            (200, 2, 0, None),
            (200, 2, 0, None),
            (409, None, None, "labels[0].label"),
            (200, 0, 1, None),
        ]
    )
    assert {s["digest"] for s in summaries} == {reference["digest"]}
    assert {s["weights_digest"] for s in summaries} == {reference["weights_digest"]}
    assert {s["labelled"] for s in summaries} == {len(good) + 3}


async def test_restore_rolls_every_replica_back_and_reopens_ids(
    switched: tuple[RedisServer, list[Replica]], tmp_path: Path
) -> None:
    server, replicas = switched
    urls = [r.url for r in replicas]
    first, later = labels("r", ROWS[:200]), labels("r", ROWS[200:300], 200)
    async with aiohttp.ClientSession() as session:
        await ok(session, "POST", f"{urls[0]}/api/models", model_body("rolled"))
        await converged(session, urls, "rolled", 0)

        async def feed(items: list[dict[str, Any]]) -> None:
            async def one(k: int) -> None:
                for i in range(k * 10, len(items), 30):
                    body = {"labels": items[i : i + 10], "source": f"desk-{k}"}
                    await ok(session, "POST", f"{urls[k]}/api/models/rolled/labels", body)

            await asyncio.gather(*(one(k) for k in range(3)))

        await feed(first)
        await converged(session, urls, "rolled", 200)
        snap = await ok(session, "POST", f"{urls[1]}/api/models/rolled/snapshots")
        at_snapshot = await ok(session, "GET", f"{urls[1]}/api/models/rolled")
        await feed(later)
        await converged(session, urls, "rolled", 300)

        replicas[2].kill()
        path = f"/api/models/rolled/snapshots/{snap['generation']}/restore"
        status, restored, _ = await call(session, "POST", urls[0] + path)
        assert status == 200, restored
        assert restored["digest"] == at_snapshot["digest"]
        assert restored["weights_digest"] == at_snapshot["weights_digest"]
        assert (restored["offset"], restored["labelled"]) == (301, 200)
        assert entries(server, "rolled")[-1] == (
            300,
            {"control": "restore", "generation": snap["generation"]},
        )
        assert drop_snapshots_from(server, "rolled", 301) == 1
        replicas[2].start()
        await asyncio.to_thread(replicas[2].wait_ready_blocking)
        back = await converged(session, urls, "rolled", 301)

        # Labels rolled back are open again, even with the other class; earlier ones are not.
        again = [flipped(x) for x in later[:20]]
        ack = await ok(
            session,
            "POST",
            f"{urls[2]}/api/models/rolled/labels",
            {"labels": again, "source": "fix", "wait": True},
        )
        assert (ack["applied"], ack["duplicates"]) == (20, 0)
        status, problem, _ = await call(
            session,
            "POST",
            f"{urls[1]}/api/models/rolled/labels",
            {"labels": [flipped(first[5])], "source": "fix"},
        )
        assert status == 409 and problem["path"] == "labels[0].label", problem
        summaries = await converged(session, urls, "rolled", 321)

        records = [r for _, r in entries(server, "rolled") if "control" not in r]
        async with embedded({"data_dir": str(tmp_path / "ref"), "snapshot_interval": 0}) as ref:
            await ok(session, "POST", f"{ref}/api/models", model_body("rolled"))
            await replay_labels(session, ref, "rolled", records[:200])
            ref_snap = await ok(session, "POST", f"{ref}/api/models/rolled/snapshots")
            await replay_labels(session, ref, "rolled", records[200:300])
            await ok(
                session,
                "POST",
                f"{ref}/api/models/rolled/snapshots/{ref_snap['generation']}/restore",
            )
            await replay_labels(session, ref, "rolled", records[300:])
            reference = await ok(session, "GET", f"{ref}/api/models/rolled")
    assert {s["digest"] for s in back} == {at_snapshot["digest"]}
    assert {s["digest"] for s in summaries} == {reference["digest"]}
    assert {s["weights_digest"] for s in summaries} == {reference["weights_digest"]}
    assert {s["labelled"] for s in summaries} == {220}


async def test_answers_and_problem_details(
    switched: tuple[RedisServer, list[Replica]], tmp_path: Path
) -> None:
    server, _ = switched
    # A keyspace of its own, and --log-retain 0, so that snapshots trim the stream.
    url = f"redis://127.0.0.1:{server.port}/3"
    settings = {"data_dir": str(tmp_path / "a"), "log": url, "snapshot_interval": 0}
    async with embedded(settings) as base, aiohttp.ClientSession() as session:
        m = f"{base}/api/models/answers"
        await ok(session, "POST", f"{base}/api/models", model_body("answers"))
        await ok(
            session,
            "POST",
            f"{m}/labels",
            {"labels": labels("a", ROWS[:50]), "source": "s", "wait": True},
        )
        rebuilt = await ok(session, "POST", f"{m}/rebuild", {"exclude_sources": ["x"]})
        assert (rebuilt["offset"], rebuilt["labelled"], rebuilt["head"]) == (51, 50, 51)
        # The snapshot written after the switch trimmed the stream below it: 409, not a guess.
        status, problem, _ = await call(session, "POST", f"{m}/rebuild", {})
        assert status == 409 and problem["type"] == "/problems/conflict", problem
        assert problem["path"] == "from_snapshot"
        assert "no longer holds labels below offset 51" in problem["detail"]
        again = await ok(session, "POST", f"{m}/rebuild", {"from_snapshot": True})
        assert (again["offset"], again["labelled"]) == (52, 50)
        assert again["excluded_sources"] == []

        for path, body, want in [
            ("/snapshots/99/restore", None, (404, "/problems/not-found", None)),
            ("/snapshots/x/restore", None, (422, "/problems/invalid-input", "generation")),
            (
                "/rebuild",
                {"exclude_sources": "x"},
                (422, "/problems/invalid-input", "exclude_sources"),
            ),
            ("/rebuild", {"from_snapshot": 1}, (422, "/problems/invalid-input", "from_snapshot")),
        ]:
            status, problem, headers = await call(session, "POST", m + path, body)
            assert (status, problem["type"], problem.get("path")) == want, problem
            assert headers["Content-Type"].startswith("application/problem+json")

        # While a restore or rebuild is being appended, labels everywhere get 503.
        keys = redis.Redis(port=server.port, db=3)
        token = json.loads(keys.hget("thresher:models", "answers") or "{}")["token"]
        freeze = f"thresher:{{answers}}:{token}:freeze"
        keys.set(freeze, "another-replica", px=60_000)
        late = {"labels": labels("b", ROWS[50:52]), "source": "s"}
        status, problem, headers = await call(session, "POST", f"{m}/labels", late)
        assert status == 503 and "Retry-After" in headers, problem
        assert "being restored or rebuilt" in problem["detail"]
        status, problem, headers = await call(session, "POST", f"{m}/rebuild", {})
        assert status == 503 and "another restore or rebuild" in problem["detail"], problem
        keys.delete(freeze)
        keys.close()
        assert (await ok(session, "POST", f"{m}/labels", late))["applied"] == 2
