"""Load generation with wrk: request bodies from demo traffic, one run, its parsed summary."""

from __future__ import annotations

import json
import shutil
import subprocess
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .common import demo_events

LUA = Path(__file__).with_name("post.lua")
ID = "@ID@"  # post.lua puts a unique id here in every request


class LoadFailed(RuntimeError):
    """wrk is missing, failed, or the server answered errors: the run measures nothing."""


@dataclass(frozen=True)
class Load:
    """One wrk run's summary."""

    requests: int
    seconds: float
    p50_ms: float
    p99_ms: float
    max_ms: float
    errors: int

    @property
    def per_second(self) -> float:
        return self.requests / self.seconds


def wrk_binary() -> str:
    path = shutil.which("wrk") or ("/usr/bin/wrk" if Path("/usr/bin/wrk").exists() else None)
    if path is None:
        raise LoadFailed("wrk is not installed (apt-get install wrk)")
    return path


def _chunks(items: list[Any], size: int) -> Iterator[list[Any]]:
    for lo in range(0, len(items) - size + 1, size):
        yield items[lo : lo + size]


def score_bodies(path: Path, *, per_request: int, lines: int, seed: int, ids: bool = True) -> Path:
    """A bodies file of score requests, ``per_request`` events each, with unique ids or none."""
    listings = demo_events(per_request * lines, seed=seed)
    with open(path, "w", encoding="utf-8") as out:
        for chunk in _chunks(listings, per_request):
            events = [{"id": ID, "fields": f} if ids else {"fields": f} for _, f, _ in chunk]
            out.write(json.dumps({"events": events}) + "\n")
    return path


def label_bodies(path: Path, *, per_request: int, lines: int, seed: int) -> Path:
    """A bodies file of label requests: unique id, label and the event's fields each."""
    listings = demo_events(per_request * lines, seed=seed)
    with open(path, "w", encoding="utf-8") as out:
        for chunk in _chunks(listings, per_request):
            labels = [{"id": ID, "label": label, "fields": f} for _, f, label in chunk]
            out.write(json.dumps({"labels": labels, "source": "bench"}) + "\n")
    return path


def run(url: str, bodies: Path, *, connections: int, seconds: int) -> Load:
    """One keep-alive wrk run of ``seconds`` against ``url``; the caller's CPU set is wrk's."""
    tag = f"r{time.time_ns():x}"  # ids stay unique across runs, warm-ups and servers
    command = [wrk_binary(), "-t1", f"-c{connections}", f"-d{seconds}s", "--latency",
               "--timeout", "10s", "-s", str(LUA), url, "--", str(bodies), tag]  # fmt: skip
    done = subprocess.run(command, capture_output=True, text=True, timeout=seconds + 60)
    summary = None
    for line in done.stdout.splitlines():
        if line.startswith("BENCH-JSON "):
            summary = json.loads(line[len("BENCH-JSON ") :])
    if done.returncode != 0 or summary is None:
        raise LoadFailed(f"wrk failed ({done.returncode}): {done.stderr.strip()[:300]}")
    errors = sum(summary[k] for k in ("status_errors", "connect", "read", "write", "timeout"))
    if summary["requests"] == 0:
        raise LoadFailed(f"wrk made no requests against {url}")
    return Load(
        requests=int(summary["requests"]),
        seconds=summary["duration_us"] / 1e6,
        p50_ms=summary["p50_us"] / 1000.0,
        p99_ms=summary["p99_us"] / 1000.0,
        max_ms=summary["max_us"] / 1000.0,
        errors=int(errors),
    )


def measured(url: str, bodies: Path, *, connections: int, seconds: int, warmup: int) -> Load:
    """A warm-up run, then the measured one; any error answer fails the measurement."""
    if warmup:
        run(url, bodies, connections=connections, seconds=warmup)
    load = run(url, bodies, connections=connections, seconds=seconds)
    if load.errors:
        raise LoadFailed(
            f"{load.errors} of {load.requests} requests to {url} failed or got an error status"
        )
    return load
