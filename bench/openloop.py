"""Open-loop load: requests sent on a fixed schedule, latency charged as a client would see it.

wrk keeps every connection busy, so at 32 connections its latency is 32 / throughput (Little's
law) whatever the server does per request. A service is judged by the latency its clients see
at a given request rate below saturation; this generator measures that. Request k is due at
``start + k / rate``; an idle one of ``connections`` keep-alive connections sends it then, or,
when none is idle, the first to finish its request sends it at once.

How latency is charged (no coordinated omission, and no client timer slack):

- the request's own time: from when it was sent to the end of its answer, plus
- the time it waited for a free connection after it was due: ``max(0, free - due)``, where
  ``free`` is when the connection that sent it finished its previous request. A slow server
  keeps every connection busy past the due times, so requests queue here and are charged it.

What is left out is the client's own lateness: a connection that was idle when the request
fell due, but whose timer fired late (this Python process shares its CPU with wrk and with
whatever else runs). That lateness is reported apart (``late_ms``); charging it from the due
time, as an earlier version did, put the client's timer slack into the server's tail.
"""

from __future__ import annotations

import asyncio
import json
import time
from collections.abc import Coroutine
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from .wrk import ID, LoadFailed


@dataclass(frozen=True)
class Paced:
    """One paced run: the offered rate, what was answered, and latency percentiles."""

    rate: float
    requests: int
    p50_ms: float
    p99_ms: float
    max_ms: float
    late_ms: float  # p99 of the client's own send lateness (timer slack), left out of latency


def _requests(url: str, bodies: Path) -> tuple[str, int, str, list[str]]:
    parts = urlsplit(url)
    lines = [line for line in bodies.read_text(encoding="utf-8").splitlines() if line.strip()]
    if not lines:
        raise LoadFailed(f"{bodies} holds no request bodies")
    return parts.hostname or "127.0.0.1", parts.port or 80, parts.path, lines


def charge(*, due: float, free: float, sent: float, done: float) -> tuple[float, float]:
    """(latency charged to the server, the client's own lateness) of one request, in seconds.

    ``due``: when the schedule wanted it sent; ``free``: when its connection finished the
    previous request; ``sent``/``done``: when it was written and when its answer ended.
    """
    queued = max(0.0, free - due)  # waited behind a busy connection: the server's doing
    return done - sent + queued, max(0.0, sent - max(due, free))


class _Connection(asyncio.Protocol):
    """One keep-alive connection: one request at a time, its answer read as bytes arrive.

    The answer's end is stamped in ``data_received``, when the loop sees the bytes, not when a
    coroutine waiting on a stream gets its turn after them.
    """

    def __init__(self, run: _Run) -> None:
        self.run = run
        self.transport: asyncio.Transport | None = None
        self.buffer = bytearray()
        self.free = 0.0  # when it finished its previous request
        self.due = self.sent = 0.0

    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        self.transport = transport  # type: ignore[assignment]

    def send(self, request: bytes, due: float) -> None:
        self.due, self.sent = due, time.perf_counter()
        if self.transport is not None:
            self.transport.write(request)

    def data_received(self, data: bytes) -> None:
        self.buffer += data
        end = self.buffer.find(b"\r\n\r\n")
        if end < 0:
            return
        head = bytes(self.buffer[:end]).lower()
        length = 0
        at = head.find(b"\r\ncontent-length:")
        if at >= 0:
            line_end = head.find(b"\r\n", at + 2)
            length = int(head[at + 17 : line_end if line_end >= 0 else None])
        if len(self.buffer) < end + 4 + length:
            return
        done = time.perf_counter()
        status = int(head[9:12])
        del self.buffer[: end + 4 + length]
        self.run.answered(self, status, done)

    def connection_lost(self, exc: Exception | None) -> None:
        self.run.lost(exc)


class _Run:
    """The schedule: request k is due at ``start + k / rate``; an idle connection sends it
    when it falls due, or the first connection to finish sends it if none was idle."""

    def __init__(self, requests: list[bytes], rate: float, total: int, start: float) -> None:
        self.requests, self.rate, self.total, self.start = requests, rate, total, start
        self.next = 0
        self.idle: list[_Connection] = []
        self.latencies: list[float] = []
        self.lateness: list[float] = []
        self.errors: list[str] = []
        self.finished = asyncio.get_running_loop().create_future()
        self.timer: asyncio.TimerHandle | None = None

    def dispatch(self) -> None:
        """Send every request that is due, while a connection is idle; wake at the next due."""
        self.timer = None
        now = time.perf_counter()
        while self.next < self.total and self.idle:
            due = self.start + self.next / self.rate
            if due > now:
                loop = asyncio.get_running_loop()
                self.timer = loop.call_later(due - now, self.dispatch)
                return
            self.idle.pop().send(self.requests[self.next % len(self.requests)], due)
            self.next += 1

    def answered(self, conn: _Connection, status: int, done: float) -> None:
        if not 200 <= status < 300:
            self.errors.append(f"status {status}")
        latency, late = charge(due=conn.due, free=conn.free, sent=conn.sent, done=done)
        self.latencies.append(latency)
        self.lateness.append(late)
        conn.free = done
        self.idle.append(conn)
        if len(self.latencies) >= self.total:
            if not self.finished.done():
                self.finished.set_result(None)
        elif self.timer is None:
            self.dispatch()

    def lost(self, exc: Exception | None) -> None:
        if not self.finished.done():
            self.finished.set_exception(exc or ConnectionResetError("server closed a connection"))


async def _paced(url: str, bodies: Path, *, rate: float, seconds: float, connections: int) -> Paced:
    host, port, path, lines = _requests(url, bodies)
    tag = f"o{time.time_ns():x}"
    total = int(rate * seconds)
    requests = []
    for k in range(total):  # built before the clock starts: the client's work kept off it
        body = lines[k % len(lines)].replace(ID, f"{tag}-{k}").encode()
        head = (
            f"POST {path} HTTP/1.1\r\nHost: {host}:{port}\r\n"
            f"Content-Type: application/json\r\nContent-Length: {len(body)}\r\n\r\n"
        ).encode()
        requests.append(head + body)
    loop = asyncio.get_running_loop()
    run = _Run(requests, rate, total, 0.0)
    conns = [(await loop.create_connection(lambda: _Connection(run), host, port))[1]
             for _ in range(connections)]  # fmt: skip
    run.start = time.perf_counter() + 0.1  # once connected: the schedule starts on time
    for conn in conns:
        conn.free = run.start
    run.idle = list(reversed(conns))
    run.timer = loop.call_later(max(0.0, run.start - time.perf_counter()), run.dispatch)
    try:
        await run.finished
    finally:
        if run.timer is not None:
            run.timer.cancel()
        for conn in conns:
            if conn.transport is not None:
                conn.transport.close()
    if run.errors:
        raise LoadFailed(f"{len(run.errors)} of {total} paced requests to {url} failed: "
                         f"{run.errors[0]}")  # fmt: skip
    latencies, lateness = sorted(run.latencies), sorted(run.lateness)

    def pct(values: list[float], q: float) -> float:
        return values[min(len(values) - 1, int(q * len(values)))] * 1000.0

    return Paced(rate, len(latencies), pct(latencies, 0.5), pct(latencies, 0.99),
                 latencies[-1] * 1000.0, pct(lateness, 0.99))  # fmt: skip


def _run(job: Coroutine[Any, Any, Paced]) -> Paced:
    """Run the generator on uvloop when installed: less of the client's own time per request."""
    try:
        import uvloop
    except ImportError:
        return asyncio.run(job)
    return uvloop.run(job)


def paced(url: str, bodies: Path, *, rate: float, seconds: float, connections: int) -> Paced:
    """One open-loop run at ``rate`` requests/s for ``seconds`` over ``connections``."""
    try:
        return _run(_paced(url, bodies, rate=rate, seconds=seconds, connections=connections))
    except (OSError, asyncio.IncompleteReadError, ValueError, IndexError) as error:
        raise LoadFailed(f"paced load against {url} failed: {error!r}") from error


if __name__ == "__main__":  # a manual check: python -m bench.openloop URL BODIES RATE
    import sys

    result = paced(sys.argv[1], Path(sys.argv[2]), rate=float(sys.argv[3]), seconds=5,
                   connections=32)  # fmt: skip
    print(json.dumps(result.__dict__))
