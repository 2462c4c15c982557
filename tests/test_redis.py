"""Scale-out over Redis Streams with real processes: a real redis-server, several
``thresher serve --log redis://...`` replicas, and kills and restarts for real.

The reference for "same weights" is a single file-log server fed the records in the order the
stream holds them; the data is scikit-learn's bundled Breast Cancer Wisconsin (Diagnostic)
set, so nothing is invented and nothing is downloaded.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import signal
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import aiohttp
import pytest
import redis
from aiohttp import web
from aiohttp.test_utils import TestServer

from conftest import ServerProcess, free_port, require_binary
from thresher import records, redisswitch
from thresher.appliedids import AppliedIds, IdTable
from thresher.errors import LogUnavailable, NotFound
from thresher.http import create_app
from thresher.redisfollow import _labels_from
from thresher.redisstate import RedisState
from thresher.settings import Settings

pytestmark = pytest.mark.redis
CLASSES = ["benign", "malignant"]  # the data set's target_names, in sorted order


def _rows() -> list[dict[str, Any]]:
    from sklearn.datasets import load_breast_cancer

    data = load_breast_cancer()
    names = [n.replace(" ", "_") for n in data.feature_names]
    return [
        {
            "fields": {n: float(v) for n, v in zip(names, x, strict=True)},
            "label": str(data.target_names[y]),
        }
        for x, y in zip(data.data, data.target, strict=True)
    ]


ROWS = _rows()
FIELDS = {n: {"kind": "numeric", "log1p": True} for n in ROWS[0]["fields"]}


def model_body(name: str) -> dict[str, Any]:
    return {
        "name": name,
        "classes": CLASSES,
        "features": {"fields": FIELDS},
        "bits": 12,
        "rule": "averaged",
    }


def labels(prefix: str, rows: list[dict[str, Any]], start: int = 0) -> list[dict[str, Any]]:
    return [{"id": f"{prefix}{start + i}", **row} for i, row in enumerate(rows)]


class RedisServer:
    """A Debian redis-server on a free loopback port, appending every write with fsync."""

    def __init__(self, directory: Path) -> None:
        self.binary = require_binary("redis-server")
        self.directory = directory
        self.port = free_port()
        self.url = f"redis://127.0.0.1:{self.port}/0"
        self.proc: subprocess.Popen[bytes] | None = None
        directory.mkdir(parents=True, exist_ok=True)

    def start(self) -> None:
        args = [
            self.binary,
            "--port",
            str(self.port),
            "--bind",
            "127.0.0.1",
            "--appendonly",
            "yes",
            "--appendfsync",
            "always",
            "--dir",
            str(self.directory),
            "--save",
            "",
        ]
        with open(self.directory / "redis.log", "ab") as log:
            self.proc = subprocess.Popen(args, stdout=log, stderr=log)
        client = redis.Redis(port=self.port, socket_connect_timeout=0.2)
        deadline = time.monotonic() + 10
        while True:
            try:
                if client.ping():
                    break
            except redis.exceptions.RedisError:  # BusyLoadingError too, while it reads the AOF
                if time.monotonic() > deadline:
                    raise
                time.sleep(0.02)
        client.close()

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
            self.proc.wait()

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            self.proc.wait(timeout=20)

    def client(self) -> redis.Redis:
        return redis.Redis(port=self.port)


class Replica(ServerProcess):
    """``thresher serve --log LOG`` in a subprocess with its own data directory and port."""

    def __init__(self, root: Path, name: str, log: str, **flags: Any) -> None:
        defaults = {"log": log, "snapshot_interval": 1, "snapshot_every": 200}
        super().__init__(root / name, **{**defaults, **flags})


async def call(
    session: aiohttp.ClientSession, method: str, url: str, body: Any = None
) -> tuple[int, Any, Any]:
    async with session.request(method, url, json=body) as resp:
        return resp.status, await resp.json(content_type=None), resp.headers


async def ok(session: aiohttp.ClientSession, method: str, url: str, body: Any = None) -> Any:
    status, data, _ = await call(session, method, url, body)
    assert status in (200, 201), (url, status, data)
    return data


def stream_key(server: RedisServer, model: str) -> str:
    """The key of a model's stream, from its entry in the Redis model directory."""
    with server.client() as client:
        entry = client.hget("thresher:models", model)
    assert entry is not None, f"model {model} is not in the Redis directory"
    return f"thresher:{{{model}}}:{json.loads(entry)['token']}:stream"


def head_of(server: RedisServer, model: str) -> int:
    """Records ever appended to a model's stream (its sequence counter), trimmed or not."""
    with server.client() as client:
        return int(client.get(stream_key(server, model).replace(":stream", ":seq")) or 0)


def stream(server: RedisServer, model: str) -> list[tuple[int, dict[str, Any]]]:
    """The model's (offset, record) pairs in stream order, read straight from Redis."""
    with server.client() as client:
        entries = client.xrange(stream_key(server, model))
    return [(int(i.split(b"-")[1]) - 1, records.decode(d[b"d"])) for i, d in entries]


async def converged(
    session: aiohttp.ClientSession, urls: list[str], model: str, head: int, timeout: float = 20
) -> list[dict[str, Any]]:
    """Wait until every replica applied ``head`` records; return their summaries."""
    deadline = time.monotonic() + timeout
    while True:
        answers = [await call(session, "GET", f"{u}/api/models/{model}") for u in urls]
        summaries = [data for status, data, _ in answers if status == 200]  # 404: not adopted yet
        if len(summaries) == len(urls) and all(s["offset"] == head == s["head"] for s in summaries):
            return summaries
        if time.monotonic() > deadline:
            raise AssertionError([(status, data.get("offset")) for status, data, _ in answers])
        await asyncio.sleep(0.05)


@contextlib.contextmanager
def three_replicas(root: Path, **flags: Any) -> Iterator[tuple[RedisServer, list[Replica]]]:
    """One Redis and three replicas started with ``flags``; each must stop with exit code 0."""
    server = RedisServer(root / "redis")
    server.start()
    replicas = [Replica(root, f"replica{k}", server.url, **flags) for k in range(3)]
    try:
        for replica in replicas:
            replica.start()
        for replica in replicas:
            replica.wait_ready_blocking()
        yield server, replicas
    finally:
        codes = [replica.stop() for replica in replicas]
        server.stop()
    assert codes == [0, 0, 0], codes  # a graceful SIGTERM exits 0 in Redis mode too


@pytest.fixture(scope="module")
def cluster(
    tmp_path_factory: pytest.TempPathFactory,
) -> Iterator[tuple[RedisServer, list[Replica]]]:
    """One Redis and three replicas shared by the non-destructive tests (one model each)."""
    # No automatic snapshots here, so the stream keeps every record for the reference server.
    quiet = {"snapshot_interval": 0, "snapshot_every": 0}
    with three_replicas(tmp_path_factory.mktemp("cluster"), **quiet) as running:
        yield running


async def test_interleaved_replicas_match_one_file_log_server(
    cluster: tuple[RedisServer, list[Replica]], tmp_path: Path
) -> None:
    server, replicas = cluster
    urls = [r.url for r in replicas]
    items = labels("bc", ROWS)
    batches = [items[i : i + 7] for i in range(0, len(items), 7)]
    async with aiohttp.ClientSession() as session:
        await ok(session, "POST", f"{urls[0]}/api/models", model_body("spread"))
        await converged(session, urls, "spread", 0)  # the others adopted it from Redis

        async def feed(k: int) -> int:
            mistakes = 0
            for batch in batches[k::3]:
                ack = await ok(
                    session,
                    "POST",
                    f"{urls[k]}/api/models/spread/labels",
                    {"labels": batch, "source": f"desk-{k}", "wait": True},
                )
                assert ack["applied"] == len(batch) and ack["mistakes"] is not None, ack
                mistakes += ack["mistakes"]
            return mistakes

        mistakes = sum(await asyncio.gather(*(feed(k) for k in range(3))))
        summaries = await converged(session, urls, "spread", len(ROWS))
        records = stream(server, "spread")
        assert [o for o, _ in records] == list(range(len(ROWS)))  # dense offsets from 0
        assert sorted(r["id"] for _, r in records) == sorted(x["id"] for x in items)
        sources = {r["source"] for _, r in records[:30]}
        assert len(sources) > 1, "the requests did not interleave"

        reference = Replica(tmp_path, "file", "file")
        reference.start()
        try:
            await asyncio.to_thread(reference.wait_ready_blocking)
            await ok(session, "POST", f"{reference.url}/api/models", model_body("spread"))
            for _, r in records:  # one request per record keeps the stream order exactly
                body = {
                    "labels": [{"id": r["id"], "label": r["label"], "fields": r["fields"]}],
                    "source": r["source"],
                }
                await ok(session, "POST", f"{reference.url}/api/models/spread/labels", body)
            calm = await ok(session, "GET", f"{reference.url}/api/models/spread")
        finally:
            assert reference.stop() == 0
    assert {s["weights_digest"] for s in summaries} == {calm["weights_digest"]}
    assert {s["digest"] for s in summaries} == {calm["digest"]}
    # wait=true answers count mistakes from the follower's records: they add up exactly.
    assert mistakes == calm["mistakes"] == summaries[0]["mistakes"] > 0


async def test_label_by_id_alone_on_another_replica(
    cluster: tuple[RedisServer, list[Replica]],
) -> None:
    _, replicas = cluster
    a, b = replicas[0].url, replicas[1].url
    async with aiohttp.ClientSession() as session:
        await ok(session, "POST", f"{a}/api/models", model_body("shared"))
        await converged(session, [a, b], "shared", 0)
        first = labels("warm", ROWS[:40])
        await ok(
            session,
            "POST",
            f"{a}/api/models/shared/labels",
            {"labels": first, "source": "seed", "wait": True},
        )
        await converged(session, [a, b], "shared", 40)
        events = [{"id": f"ev{i}", "fields": ROWS[i]["fields"]} for i in range(40, 60)]
        scored = await ok(session, "POST", f"{a}/api/models/shared/score", {"events": events})
        served = {r["id"]: r["label"] for r in scored["results"]}
        by_id = [{"id": f"ev{i}", "label": ROWS[i]["label"]} for i in range(40, 60)]
        ack = await ok(
            session,
            "POST",
            f"{b}/api/models/shared/labels",
            {"labels": by_id, "source": "queue", "wait": True},
        )
        assert ack["applied"] == 20 and ack["duplicates"] == 0
        await converged(session, [a, b], "shared", 60)
        reports = [await ok(session, "GET", f"{u}/api/models/shared/quality") for u in (a, b)]
    wrong = sum(served[x["id"]] != x["label"] for x in by_id)
    for report in reports:
        assert report["served"]["labelled"] == 20  # only the labels of scored events
        assert report["served"]["mistakes"] == wrong
        assert report["by_source"] == {"queue": 20, "seed": 40}


async def test_same_id_on_two_replicas_is_applied_once(
    cluster: tuple[RedisServer, list[Replica]],
) -> None:
    _, replicas = cluster
    a, b, c = (r.url for r in replicas)
    items = labels("once", ROWS[:30])
    async with aiohttp.ClientSession() as session:
        await ok(session, "POST", f"{a}/api/models", model_body("once"))
        await converged(session, [a, b, c], "once", 0)

        async def send(url: str, item: dict[str, Any]) -> Any:
            body = {"labels": [item], "source": "race"}
            return await ok(session, "POST", f"{url}/api/models/once/labels", body)

        acks = await asyncio.gather(*(send(u, x) for x in items for u in (a, b)))
        await converged(session, [a, b, c], "once", 30)
        flipped = {**items[3], "label": CLASSES[1 - CLASSES.index(items[3]["label"])]}
        status, problem, _ = await call(
            session,
            "POST",
            f"{c}/api/models/once/labels",
            {"labels": [items[4], flipped], "source": "race"},
        )
        after = await converged(session, [a, b, c], "once", 30)
    for k in range(len(items)):  # each pair: one replica applied it, the other saw a duplicate
        pair = acks[2 * k : 2 * k + 2]
        assert sorted((x["applied"], x["duplicates"]) for x in pair) == [(0, 1), (1, 0)], pair
    assert status == 409 and problem["path"] == "labels[1].label", problem
    assert {s["labelled"] for s in after} == {30}  # the refused request appended nothing


async def test_late_replica_catches_up_from_snapshot_and_stream(
    cluster: tuple[RedisServer, list[Replica]], tmp_path: Path
) -> None:
    server, replicas = cluster
    a = replicas[0].url
    async with aiohttp.ClientSession() as session:
        await ok(session, "POST", f"{a}/api/models", model_body("late"))
        for k, start in enumerate((0, 250, 400)):
            chunk = labels("late", ROWS[start : start + (250, 150, 100)[k]], start)
            await ok(
                session,
                "POST",
                f"{a}/api/models/late/labels",
                {"labels": chunk, "source": "s", "wait": True},
            )
            if k < 2:
                await ok(session, "POST", f"{a}/api/models/late/snapshots")
        snaps = (await ok(session, "GET", f"{a}/api/models/late/snapshots"))["snapshots"]
        oldest = min(s["offset"] for s in snaps)
        with server.client() as client:
            kept = client.xrange(stream_key(server, "late"), count=1)
        # Trimmed below the oldest kept snapshot, never above it.
        assert oldest == 250 and int(kept[0][0].split(b"-")[1]) - 1 == oldest, (snaps, kept)
        late = Replica(tmp_path, "late", server.url)
        late.start()
        try:
            await asyncio.to_thread(late.wait_ready_blocking)
            both = [a, late.url]
            await converged(session, both, "late", 500)
            more = labels("late", ROWS[500:], 500)
            await ok(
                session,
                "POST",
                f"{late.url}/api/models/late/labels",
                {"labels": more, "source": "s"},
            )
            summaries = await converged(session, both, "late", len(ROWS))
            async with session.get(f"{late.url}/metrics") as resp:
                metrics = await resp.text()
        finally:
            assert late.stop() == 0
    assert summaries[0]["digest"] == summaries[1]["digest"]
    assert summaries[0]["weights_digest"] == summaries[1]["weights_digest"]
    assert f'thresher_log_applied_offset{{model="late"}} {len(ROWS)}.0' in metrics
    assert f'thresher_log_head_offset{{model="late"}} {len(ROWS)}.0' in metrics
    assert 'thresher_replica_lag_labels{model="late"} 0.0' in metrics


async def test_redis_outage_and_killed_replica_lose_no_acknowledged_label(
    tmp_path: Path,
) -> None:
    server = RedisServer(tmp_path / "redis")
    server.start()
    a = Replica(tmp_path, "a", server.url)
    b = Replica(tmp_path, "b", server.url)
    items = labels("f", ROWS)
    halves = [[items[i : i + 5] for i in range(k * 5, len(items), 10)] for k in (0, 1)]
    acked: list[dict[str, Any]] = []
    try:
        for replica in (a, b):
            replica.start()
        for replica in (a, b):
            await asyncio.to_thread(replica.wait_ready_blocking)
        async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=10)) as session:
            await ok(session, "POST", f"{a.url}/api/models", model_body("faults"))
            await converged(session, [a.url, b.url], "faults", 0)

            async def feed(replica: Replica, batches: list[list[dict[str, Any]]]) -> None:
                for batch in batches:
                    while True:
                        with contextlib.suppress(aiohttp.ClientError, TimeoutError):
                            status, _, _ = await call(
                                session,
                                "POST",
                                f"{replica.url}/api/models/faults/labels",
                                {"labels": batch, "source": "s"},
                            )
                            if status == 200:
                                acked.extend(batch)
                                break
                            assert status == 503, status
                        await asyncio.sleep(0.05)
                    await asyncio.sleep(0.01)

            async def until(count: int) -> None:
                while len(acked) < count:
                    await asyncio.sleep(0.01)

            feeders = asyncio.gather(feed(a, halves[0]), feed(b, halves[1]))
            await until(100)
            server.kill()
            probe = {"labels": [{"id": "probe", **ROWS[0]}], "source": "s"}
            for _ in range(3):  # the broken connection first, then refused connections
                status, problem, headers = await call(
                    session, "POST", f"{a.url}/api/models/faults/labels", probe
                )
                assert status == 503 and "Retry-After" in headers, (status, problem)
                assert problem["type"] == "/problems/log-unavailable"
            event = {"events": [{"id": "x", "fields": ROWS[0]["fields"]}]}
            for url in (a.url, b.url):
                status, scored, _ = await call(
                    session, "POST", f"{url}/api/models/faults/score", event
                )
                assert status == 200 and scored["results"][0]["label"] in CLASSES
            outage = len(acked)
            await asyncio.sleep(0.5)
            assert len(acked) == outage  # nothing acknowledged while Redis was down
            server.start()
            await until(outage + 150)
            b.kill()
            await asyncio.sleep(0.2)
            b.start()
            await feeders
            await asyncio.to_thread(b.wait_ready_blocking)
            head = head_of(server, "faults")
            summaries = await converged(session, [a.url, b.url], "faults", head)
            for url in (a.url, b.url):  # every acknowledged label survived: all duplicates now
                for k in range(0, len(acked), 200):
                    ack = await ok(
                        session,
                        "POST",
                        f"{url}/api/models/faults/labels",
                        {"labels": acked[k : k + 200], "source": "s"},
                    )
                    assert ack["applied"] == 0, ack
    finally:
        codes = [a.stop(), b.stop()]
        server.stop()
    assert codes == [0, 0]
    assert head == len(ROWS)  # the feeders resent until acknowledged; no label twice
    assert summaries[0]["digest"] == summaries[1]["digest"]
    assert summaries[0]["labelled"] == len(ROWS)


async def test_unconfirmed_replication_answers_503_and_a_retry_is_a_duplicate(
    cluster: tuple[RedisServer, list[Replica]], tmp_path: Path
) -> None:
    server, _ = cluster
    # A keyspace of its own on the same server; that server has no replicas, so WAIT 1 fails.
    url = f"redis://127.0.0.1:{server.port}/1"
    settings = Settings.from_mapping(
        {
            "data_dir": str(tmp_path / "w"),
            "log": url,
            "redis_wait_replicas": 1,
            "snapshot_interval": 0,
        }
    )
    app: web.Application = create_app(settings)
    test_server = TestServer(app, host="127.0.0.1")
    await test_server.start_server()
    base = str(test_server.make_url("")).rstrip("/")
    try:
        async with aiohttp.ClientSession() as session:
            while (await call(session, "GET", f"{base}/readyz"))[0] != 200:
                await asyncio.sleep(0.05)
            await ok(session, "POST", f"{base}/api/models", model_body("waited"))
            body = {"labels": labels("w", ROWS[:3]), "source": "s"}
            status, problem, headers = await call(
                session, "POST", f"{base}/api/models/waited/labels", body
            )
            assert status == 503 and "Retry-After" in headers, problem
            assert "may still be applied later" in problem["detail"]
            assert "retry with the same ids is safe" in problem["detail"]
            await converged(session, [base], "waited", 3)  # it reached the primary after all
            retry = await ok(session, "POST", f"{base}/api/models/waited/labels", body)
    finally:
        await test_server.close()
    assert (retry["applied"], retry["duplicates"]) == (0, 3)


async def test_append_script_is_atomic_dense_and_exactly_once(
    cluster: tuple[RedisServer, list[Replica]],
) -> None:
    server, _ = cluster
    state = RedisState(f"redis://127.0.0.1:{server.port}/2")
    try:
        token = await state.define("unit", {"name": "unit"})
        log = await state.open_log("unit", token)
        pay = [b"p%d" % i for i in range(4)]
        first, dups, conflict = await log.admit(pay[:2], [("a", "x", "s"), ("b", "y", "s")])
        assert (first, dups, conflict, log.head()) == (0, [], None, 2)
        # A conflict anywhere refuses the whole batch: nothing of it is appended.
        first, dups, conflict = await log.admit(pay[2:], [("c", "x", "s"), ("a", "y", "s")])
        assert (first, dups, conflict) == (-1, [], (1, "x"))
        first, dups, conflict = await log.admit(pay[2:], [("a", "x", "s"), (None, "", "s")])
        assert (first, dups, conflict, log.head()) == (2, [0], None, 3)
        assert [o async for o, _ in log.read(0)] == [0, 1, 2]
        await state.undefine("unit", token)
        with pytest.raises(NotFound):  # a deleted model's appends are refused, not revived
            await log.admit(pay[:1], [("z", "x", "s")])
    finally:
        await state.close()
    with pytest.raises(LogUnavailable):  # nothing listens on a fresh free port
        dead = RedisState(f"redis://127.0.0.1:{free_port()}/0")
        try:
            await dead.definitions()
        finally:
            await dead.close()


def _generation(table: IdTable | None) -> set[bytes]:
    return set() if table is None else set(table.keys()[0])


async def test_windowed_admission_rotates_as_the_replicas_index_and_a_switch_stages_it(
    cluster: tuple[RedisServer, list[Replica]],
) -> None:
    server, _ = cluster
    state = RedisState(f"redis://127.0.0.1:{server.port}/3", applied_window=4)
    try:
        token = await state.define("windowed", {"name": "windowed"})
        log = await state.open_log("windowed", token)
        mirror = AppliedIds(4)  # what every follower's model holds at the same offset
        for i in range(10):
            first, dups, conflict = await log.admit([b"p"], [(f"a{i}", "x", "s")])
            assert (first, dups, conflict) == (i, [], None)
            mirror[f"a{i}"] = 0
            async with state.client.pipeline(transaction=False) as pipe:
                pipe.hkeys(log.keys.ids).hkeys(log.keys.previous)
                current, previous = await pipe.execute()
            assert set(current) == _generation(mirror.current)
            assert set(previous) == _generation(mirror.previous)
        # a9 is 1 id back, a0 10: past 2N = 8, so a0 is admitted (and trained) again.
        assert (await log.admit([b"p", b"p"], [("a9", "x", "s"), ("a0", "x", "s")]))[:2] == (
            10,
            [0],
        )
        # Raw ids written before ids were hashed still count until the next switch.
        await state.client.hset(log.keys.legacy, "old", "y")
        assert (await log.admit([b"p"], [("old", "x", "s")]))[2] == (0, "y")
        assert (await log.admit([b"p"], [("old", "y", "s")]))[:2] == (-1, [0])
        # A restore sets both generations from the snapshot's arrays and drops the raw ids.
        snapshot = AppliedIds(4)
        snapshot.update((f"s{i}", i % 2) for i in range(6))
        store = state.store("windowed", token, keep=3)
        info = await asyncio.to_thread(
            store.write,
            {"format": 2, "offset": 11, "applied": snapshot.state(), "excluded": []},
            offset=11,
            time=1.0,
        )
        await redisswitch.append(log, store, redisswitch.restore(info.generation), ["x", "y"])
        async with state.client.pipeline(transaction=False) as pipe:
            pipe.hgetall(log.keys.ids).hkeys(log.keys.previous).exists(log.keys.legacy)
            current, previous, legacy = await pipe.execute()
        keys, ys = snapshot.current.keys()
        assert current == {k: [b"x", b"y"][y] for k, y in zip(keys, ys, strict=True)}
        assert set(previous) == _generation(snapshot.previous) and legacy == 0
        assert (await log.admit([b"p", b"p"], [("s5", "y", "s"), ("old", "x", "s")]))[1] == [0]
        await state.undefine("windowed", token)
    finally:
        await state.close()


def test_a_follower_takes_entries_whole_only_when_they_are_the_next_labels() -> None:
    def entry(offset: int, field: bytes = b"d") -> tuple[bytes, dict[bytes, bytes]]:
        return f"0-{offset + 1}".encode(), {field: b"x"}  # stream entry 0-n holds offset n-1

    run = [entry(k) for k in range(5, 9)]
    assert _labels_from(5, run)
    assert not _labels_from(4, run) and not _labels_from(6, run)
    assert not _labels_from(5, [*run[:2], *run[3:]])  # a gap (trimmed entries)
    assert not _labels_from(5, [*run[:2], entry(7, b"c"), *run[3:]])  # a control record
    assert not _labels_from(5, [])
