"""Scale-out figures of the Redis Streams label log (figure 9 of ``python -m bench``).

Run ``python -m bench.bench_redis [--quick]``. It starts its own redis-server on a free loopback
port with ``--appendonly yes --appendfsync always`` (an acknowledged label is on disk), uses the
demo's invented listings and model definition, and measures:

- admission: labels/s the append script takes into one stream (batches of 100, 4 writers),
  beside the file log's group-committed appends (flush ``always``) on the same disk;
- the stream alone: labels/s one reader gets through XREAD (batches of 1,000) and decoding
  (``records.decode_many`` with the model's row key, as the follower decodes: the records
  carry the rows their label request made, so fields stay packed); redis-py parses replies
  with hiredis when it is installed (the ``redis``, ``test`` and ``bench`` extras install it);
- catch-up: labels/s one replica applies from the stream (its follower: XREAD, then
  ``Model.apply_payloads`` on runs of entries), beside replaying the same records from the file
  log; target 50,000/s;
- one replica over HTTP: labels/s ``thresher serve --log redis://`` acknowledges *and* applies
  (batches of 100, 4 clients), beside a file-log server under the same load;
- label-to-visible: a replica process takes labels at ~1,000/s (10 per request, 100 requests/s
  on a fixed schedule); a second replica in this process timestamps when it applies each
  request's last label; p50 and p99 from the send; target p99 < 50 ms;
- scoring: p50 of one-event score requests with an id (the awaited, pipelined write of the
  shared event cache included), beside a file-log server.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import Any

import aiohttp
import redis
from redis.utils import HIREDIS_AVAILABLE

from thresher import records
from thresher.demo_traffic import DEMO_MODEL, ListingTraffic
from thresher.eventcache import EventCache
from thresher.labellog import FileLog
from thresher.lifecycle import replay
from thresher.models import Model, ModelConfig
from thresher.redisstate import RedisState

ROOT = Path(__file__).resolve().parent.parent
CATCH_UP_TARGET = 50_000.0  # labels/s
LATENCY_TARGET_MS = 50.0
Row = dict[str, Any]


def _row(figure: str, value: float, unit: str, *, peer: float | None = None, peer_name: str = "",
         goal: tuple[str, float] | None = None, note: str = "") -> Row:  # fmt: skip
    """A result row; ``goal`` is (">=" or "<", threshold) on the value."""
    target = "" if goal is None else f"{'≥' if goal[0] == '>=' else '<'} {goal[1]:,g} {unit}"
    met = None if goal is None else (value >= goal[1] if goal[0] == ">=" else value < goal[1])
    return {"figure": figure, "value": value, "unit": unit, "peer": peer, "peer_name": peer_name,
            "ratio": value / peer if peer else None, "target": target, "met": met, "note": note,
            "_goal": goal}  # fmt: skip


def _medians(runs: list[list[Row]]) -> list[Row]:
    """One row per figure: the median of the runs, with every run's value kept."""
    out = []
    for rows in zip(*runs, strict=True):
        first = rows[0]
        values = [r["value"] for r in rows]
        peers = [r["peer"] for r in rows if r["peer"] is not None]
        peer = statistics.median(peers) if peers else None
        row = _row(first["figure"], statistics.median(values), first["unit"], peer=peer,
                   peer_name=first["peer_name"], goal=first["_goal"],
                   note=first["note"])  # fmt: skip
        row.update(samples=values, peer_samples=peers)
        out.append(row)
    return out


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def _percentile(values: list[float], q: float) -> float:
    ordered = sorted(values)
    return ordered[min(len(ordered) - 1, int(q * len(ordered)))]


class _Process:
    """A child process started from the repository root and stopped with SIGTERM."""

    def __init__(self, args: list[str], log: Path) -> None:
        with open(log, "ab") as out:
            self.proc = subprocess.Popen(args, cwd=ROOT, stdout=out, stderr=out)

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            self.proc.wait(timeout=30)


def _redis_server(tmp: Path) -> tuple[_Process, int]:
    port = _free_port()
    args = ["redis-server", "--port", str(port), "--bind", "127.0.0.1", "--appendonly", "yes",
            "--appendfsync", "always", "--save", "", "--dir", str(tmp)]  # fmt: skip
    server = _Process(args, tmp / "redis.log")
    client = redis.Redis(port=port)
    for _ in range(500):
        try:
            client.ping()
            break
        except redis.exceptions.RedisError:
            time.sleep(0.01)
    client.close()
    return server, port


async def _replica(tmp: Path, name: str, log: str) -> tuple[_Process, str]:
    port = _free_port()
    args = [sys.executable, "-m", "thresher.cli", "serve", "--data-dir", str(tmp / name),
            "--port", str(port), "--log", log, "--log-level", "warning",
            "--snapshot-interval", "0", "--snapshot-every", "0"]  # fmt: skip
    proc, url = _Process(args, tmp / f"{name}.log"), f"http://127.0.0.1:{port}"
    async with aiohttp.ClientSession() as session:
        for _ in range(600):
            try:
                async with session.get(url + "/readyz") as resp:
                    if resp.status == 200:
                        return proc, url
            except aiohttp.ClientError:
                pass
            await asyncio.sleep(0.05)
    raise RuntimeError(f"replica {name} did not start; see {tmp / name}.log")


def _labels(n: int, seed: int, prefix: str) -> list[dict[str, Any]]:
    events = ListingTraffic(seed=seed).batch(n)
    return [{"id": f"{prefix}{i}", "label": y, "fields": f} for i, (_, f, y) in enumerate(events)]


def _payloads(items: list[dict[str, Any]]) -> list[bytes]:
    """The records as a label request writes them: fields packed, with the rows it made."""
    model = _model(None)
    batch = model.featurizer.transform_batch([x["fields"] for x in items])
    pack = records.fields_packer()
    recs = [{"id": x["id"], "label": x["label"], "source": "bench", "served": None,
             "time": 1.0, "packed": pack(x["fields"])} for x in items]  # fmt: skip
    return records.encode_many(recs, model.row_key, batch, range(len(items)))


async def _workers(batches: list[Any], work: Callable[[Any], Awaitable[None]], n: int) -> float:
    """Seconds for ``n`` concurrent workers to take every batch in turn."""
    queue = list(reversed(batches))

    async def worker() -> None:
        while queue:
            await work(queue.pop())

    start = time.perf_counter()
    await asyncio.gather(*(worker() for _ in range(n)))
    return time.perf_counter() - start


def _model(log: Any) -> Model:
    config = ModelConfig.from_json({**DEMO_MODEL, "name": "bench"}, created=0.0)
    return Model(config, log, cache=EventCache(), apply_on_append=False)


async def _storage_rows(state: RedisState, tmp: Path, n: int) -> list[Row]:
    """Admission, stream read and catch-up figures, in this process."""
    items = _labels(n, seed=3, prefix="a")
    payloads = _payloads(items)
    keys = [(x["id"], x["label"], "bench") for x in items]
    spans = [(i, i + 100) for i in range(0, n, 100)]
    token = await state.define("bench", {})
    log = await state.open_log("bench", token)

    async def admit(span: tuple[int, int]) -> None:
        await log.admit(payloads[span[0] : span[1]], keys[span[0] : span[1]])

    admit_s = await _workers(spans, admit, 4)
    filelog = await FileLog.open(tmp / "filelog", flush="always")

    async def append(span: tuple[int, int]) -> None:
        await filelog.append(payloads[span[0] : span[1]])

    append_s = await _workers(spans, append, 4)

    reader = _model(None)  # the follower's decoding: its row key and bits
    start, cursor, got = time.perf_counter(), "0-0", 0
    while got < n:
        reply = await state.reader.xread({log.keys.stream: cursor}, count=1000)
        for _, entries in reply:
            decoded, error = records.decode_many(
                [data[b"d"] for _, data in entries], reader.row_key, reader.config.bits
            )
            if error is not None:
                raise error
            cursor, got = entries[-1][0], got + len(decoded)
    read_s = time.perf_counter() - start

    model = _model(log)
    start = time.perf_counter()
    log.follow(lambda: model, state.store("bench", token, keep=1))
    while model.offset < n:
        await asyncio.sleep(0.005)
    follow_s = time.perf_counter() - start
    await log.close()
    peer = _model(filelog)
    start = time.perf_counter()
    await replay(peer)
    replay_s = time.perf_counter() - start
    await filelog.close()
    await state.undefine("bench", token)
    rate = n / follow_s
    return [
        _row("stream admission, one stream (script, batches of 100, 4 writers)", n / admit_s,
             "labels/s", peer=n / append_s, peer_name="file log append, flush always"),
        _row("stream read + decode, one reader (XREAD batches of 1,000)", n / read_s, "labels/s",
             note=f"reply parser: {'hiredis' if HIREDIS_AVAILABLE else 'pure Python'}"),
        _row("replica catch-up apply rate from the stream", rate, "labels/s",
             peer=n / replay_s, peer_name="replay from the file log", goal=(">=", CATCH_UP_TARGET),
             note="bound by Model.apply_batch (featurize, predict, update, quality), not Redis"),
    ]  # fmt: skip


async def _post(session: aiohttp.ClientSession, url: str, body: Any) -> Any:
    async with session.post(url, json=body) as resp:
        data = await resp.json()
        if resp.status not in (200, 201):
            raise RuntimeError(f"{url}: {resp.status} {data}")
        return data


async def _drained(session: aiohttp.ClientSession, url: str, offset: int) -> None:
    while True:
        async with session.get(url + "/api/models/listings") as resp:
            if (await resp.json())["offset"] >= offset:
                return
        await asyncio.sleep(0.01)


async def _http_rate(session: aiohttp.ClientSession, url: str, n: int) -> float:
    """Labels/s acknowledged and applied through one server."""
    items = _labels(n, seed=5, prefix="h")
    batches = [items[i : i + 100] for i in range(0, n, 100)]
    path = url + "/api/models/listings/labels"
    last = [0]

    async def send(batch: list[dict[str, Any]]) -> None:
        ack = await _post(session, path, {"labels": batch, "source": "bench"})
        last[0] = max(last[0], ack["offset"])

    start = time.perf_counter()
    await _workers(batches, send, 4)
    await _drained(session, url, last[0])
    return n / (time.perf_counter() - start)


async def _score_p50(session: aiohttp.ClientSession, url: str, n: int) -> tuple[float, float]:
    events = ListingTraffic(seed=9).batch(n)
    took = []
    for event_id, fields, _ in events:
        start = time.perf_counter()
        await _post(session, url + "/api/models/listings/score",
                    {"events": [{"id": event_id, "fields": fields}]})  # fmt: skip
        took.append((time.perf_counter() - start) * 1000)
    return statistics.median(took), _percentile(took, 0.99)


async def _latency(
    session: aiohttp.ClientSession, state: RedisState, url: str, seconds: float
) -> list[float]:
    """Send-to-applied-elsewhere milliseconds of requests of 10 labels at 100 requests/s."""
    stored, token = (await state.definitions())["listings"]
    log = await state.open_log("listings", token)
    other = Model(ModelConfig.from_stored(stored), log, cache=EventCache(), apply_on_append=False)
    seen: dict[int, float] = {}
    apply_batch = other.apply_batch

    def timed(first: int, recs: Any, rows: Any = None) -> None:
        apply_batch(first, recs, rows)
        now = time.perf_counter()
        for k in range(len(recs)):
            seen[first + k] = now

    other.apply_batch = timed  # type: ignore[method-assign]
    other.offset = log.head()  # this replica starts at the head: only new labels are timed
    log.follow(lambda: other, state.store("listings", token, keep=1))
    count = int(seconds * 100)
    items = _labels(count * 10, seed=11, prefix="l")
    sent: list[tuple[float, int]] = []

    async def one(k: int, at: float) -> None:
        await asyncio.sleep(max(0.0, at - time.perf_counter()))
        begun = time.perf_counter()
        ack = await _post(session, url + "/api/models/listings/labels",
                          {"labels": items[10 * k : 10 * k + 10], "source": "bench"})  # fmt: skip
        sent.append((begun, ack["offset"] - 1))

    start = time.perf_counter() + 0.1
    await asyncio.gather(*(one(k, start + k / 100) for k in range(count)))
    while len(seen) < count * 10:
        await asyncio.sleep(0.01)
    await log.close()
    return [(seen[last] - begun) * 1000 for begun, last in sent]


async def _measure(quick: bool, tmp: Path) -> list[Row]:
    server, port = _redis_server(tmp)
    url = f"redis://127.0.0.1:{port}/0"
    state = RedisState(url)
    started: list[_Process] = [server]
    try:
        rows = await _storage_rows(state, tmp, 3000 if quick else 20000)
        replica, a_url = await _replica(tmp, "a", url)
        started.append(replica)
        peer, f_url = await _replica(tmp, "f", "file")
        started.append(peer)
        async with aiohttp.ClientSession() as session:
            body = {**DEMO_MODEL, "name": "listings"}
            for base in (a_url, f_url):
                await _post(session, base + "/api/models", body)
            n = 2000 if quick else 10000
            redis_rate, file_rate = [await _http_rate(session, u, n) for u in (a_url, f_url)]
            rows.append(_row("labels/s one replica sustains over HTTP (acknowledged and applied, "
                             "batches of 100, 4 clients)", redis_rate, "labels/s", peer=file_rate,
                             peer_name="file-log server"))  # fmt: skip
            millis = await _latency(session, state, a_url, 3.0 if quick else 10.0)
            p50, p99 = statistics.median(millis), _percentile(millis, 0.99)
            rows.append(_row("label-to-visible on another replica at 1,000 labels/s, p50", p50,
                             "ms"))  # fmt: skip
            rows.append(_row("label-to-visible on another replica at 1,000 labels/s, p99", p99,
                             "ms", goal=("<", LATENCY_TARGET_MS)))  # fmt: skip
            k = 300 if quick else 1500
            (r50, r99), (f50, f99) = [await _score_p50(session, u, k) for u in (a_url, f_url)]
            rows.append(_row("score p50, one event with an id (shared event cache written)", r50,
                             "ms", peer=f50, peer_name="file-log server (local cache only)",
                             note=f"p99 {r99:.2f} ms vs {f99:.2f} ms"))  # fmt: skip
        return rows
    finally:
        await state.close()
        for proc in reversed(started):
            proc.stop()


def run(quick: bool) -> list[Row]:
    """Every figure of this file as result rows: one pass when quick, else the median of 3."""
    runs = []
    for _ in range(1 if quick else 3):
        with tempfile.TemporaryDirectory(prefix="bench-redis-") as tmp:
            runs.append(asyncio.run(_measure(quick, Path(tmp))))
    return [{k: v for k, v in row.items() if k != "_goal"} for row in _medians(runs)]


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="short runs, for development")
    args = parser.parse_args(argv)
    for item in run(args.quick):
        print(json.dumps(item))


if __name__ == "__main__":
    os.environ.setdefault("PYTHONUNBUFFERED", "1")
    main()
