"""Open-loop load: requests sent on a fixed schedule, latency counted from when each was due.

wrk keeps every connection busy, so at 32 connections its latency is 32 / throughput (Little's
law) whatever the server does per request. A service is judged by the latency its clients see
at a given request rate below saturation; this generator measures that. Request k is due at
``start + k / rate``; the first idle one of ``connections`` keep-alive connections sends it, and
its latency runs from the due time to the end of the answer, so a request that waited for a
free connection (a slow server) is charged the wait too (no coordinated omission).
"""

from __future__ import annotations

import asyncio
import itertools
import json
import time
from dataclasses import dataclass
from pathlib import Path
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
    late_ms: float  # p99 of how late the client itself sent requests (its own timer slack)


def _requests(url: str, bodies: Path) -> tuple[str, int, str, list[str]]:
    parts = urlsplit(url)
    lines = [line for line in bodies.read_text(encoding="utf-8").splitlines() if line.strip()]
    if not lines:
        raise LoadFailed(f"{bodies} holds no request bodies")
    return parts.hostname or "127.0.0.1", parts.port or 80, parts.path, lines


async def _one(
    reader: asyncio.StreamReader, writer: asyncio.StreamWriter, head: bytes, body: bytes
) -> int:
    writer.write(head + body)
    status_line = await reader.readline()
    length = 0
    while True:
        line = await reader.readline()
        if line in (b"\r\n", b""):
            break
        name, _, value = line.partition(b":")
        if name.strip().lower() == b"content-length":
            length = int(value)
    await reader.readexactly(length)
    return int(status_line.split()[1])


async def _paced(url: str, bodies: Path, *, rate: float, seconds: float, connections: int) -> Paced:
    host, port, path, lines = _requests(url, bodies)
    tag = f"o{time.time_ns():x}"
    total = int(rate * seconds)
    counter = itertools.count()
    latencies: list[float] = []
    lateness: list[float] = []
    errors: list[str] = []
    start = time.perf_counter() + 0.2

    async def worker() -> None:
        reader, writer = await asyncio.open_connection(host, port)
        try:
            while True:
                k = next(counter)
                if k >= total:
                    return
                due = start + k / rate
                wait = due - time.perf_counter()
                if wait > 0.002:  # sleep most of the way, then yield until due: tight sends
                    await asyncio.sleep(wait - 0.0015)
                while time.perf_counter() < due:
                    await asyncio.sleep(0)
                sent = time.perf_counter()
                body = lines[k % len(lines)].replace(ID, f"{tag}-{k}").encode()
                head = (
                    f"POST {path} HTTP/1.1\r\nHost: {host}:{port}\r\n"
                    f"Content-Type: application/json\r\nContent-Length: {len(body)}\r\n\r\n"
                ).encode()
                status = await _one(reader, writer, head, body)
                done = time.perf_counter()
                if not 200 <= status < 300:
                    errors.append(f"status {status}")
                latencies.append(done - due)
                lateness.append(sent - due)
        finally:
            writer.close()

    await asyncio.gather(*(worker() for _ in range(connections)))
    if errors:
        raise LoadFailed(f"{len(errors)} of {total} paced requests to {url} failed: {errors[0]}")
    latencies.sort()
    lateness.sort()

    def pct(values: list[float], q: float) -> float:
        return values[min(len(values) - 1, int(q * len(values)))] * 1000.0

    return Paced(rate, len(latencies), pct(latencies, 0.5), pct(latencies, 0.99),
                 latencies[-1] * 1000.0, pct(lateness, 0.99))  # fmt: skip


def paced(url: str, bodies: Path, *, rate: float, seconds: float, connections: int) -> Paced:
    """One open-loop run at ``rate`` requests/s for ``seconds`` over ``connections``."""
    try:
        return asyncio.run(_paced(url, bodies, rate=rate, seconds=seconds, connections=connections))
    except (OSError, asyncio.IncompleteReadError, ValueError, IndexError) as error:
        raise LoadFailed(f"paced load against {url} failed: {error!r}") from error


if __name__ == "__main__":  # a manual check: python -m bench.openloop URL BODIES RATE
    import sys

    result = paced(sys.argv[1], Path(sys.argv[2]), rate=float(sys.argv[3]), seconds=5,
                   connections=32)  # fmt: skip
    print(json.dumps(result.__dict__))
