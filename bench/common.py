"""Shared pieces of the benchmarks: result rows, medians, CPU pinning, events, machine facts."""

from __future__ import annotations

import contextlib
import datetime
import os
import platform
import socket
import statistics
import subprocess
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from thresher.demo_traffic import DEMO_MODEL, DEMO_SPEC, ListingTraffic

ROOT = Path(__file__).resolve().parent.parent  # the repository: servers start from here
CLASSES = ("fine", "fraud")
# Every figure uses the demo's spec and hashing seed; the rule is `classic` where a figure is
# compared with scikit-learn's Perceptron, which runs the same mistake-driven rule.
BITS = int(DEMO_MODEL["bits"])
SEED = int(DEMO_MODEL["seed"])

# (comparison, threshold): what a row's "met" checks, and how the target reads.
Target = tuple[str, float]


@dataclass(frozen=True)
class Mode:
    """How long and how often to measure; quick is for development, full for the report."""

    name: str
    repeats: int
    duration: int  # seconds of one measured load run
    warmup: int  # seconds of the load run before each measured one
    events: int  # in-process events per measured pass

    @property
    def quick(self) -> bool:
        return self.name == "quick"


QUICK = Mode("quick", repeats=1, duration=2, warmup=1, events=5000)
FULL = Mode("full", repeats=3, duration=10, warmup=3, events=20000)


def target_text(target: Target, unit: str) -> str:
    """A target as the table shows it."""
    kind, threshold = target
    if kind == "ratio>=":
        return f"≥ {threshold:g}x"
    if kind == "ratio<=":
        return f"≤ {threshold:g}x"
    sign = "≥" if kind == "value>=" else "≤"
    return f"{sign} {fmt(threshold, unit)}"


def judge(value: float | None, ratio: float | None, target: Target | None) -> bool | None:
    """Whether the measured value (or ratio) meets the target; None when not measured."""
    if target is None:
        return None
    kind, threshold = target
    got = ratio if kind.startswith("ratio") else value
    if got is None:
        return None
    return got >= threshold if kind.endswith(">=") else got <= threshold


def row(
    figure: str,
    value: float | None,
    unit: str,
    *,
    peer: float | None = None,
    peer_name: str = "",
    ratio: float | None = None,
    target: Target | None = None,
    note: str = "",
    samples: Sequence[float] = (),
    peer_samples: Sequence[float] = (),
) -> dict[str, Any]:
    """One line of the results table; ``ratio`` defaults to value / peer."""
    if ratio is None and value is not None and peer:
        ratio = value / peer
    return {
        "figure": figure,
        "value": value,
        "unit": unit,
        "peer": peer,
        "peer_name": peer_name,
        "ratio": ratio,
        "target": target_text(target, unit) if target else "",
        "goal": list(target) if target else None,
        "met": judge(value, ratio, target),
        "note": note,
        "samples": [float(s) for s in samples],
        "peer_samples": [float(s) for s in peer_samples],
    }


def missing_row(figure: str, why: str) -> dict[str, Any]:
    """A row that says a figure could not be measured, and why."""
    out = row(figure, None, "", note=f"not measured: {why}")
    out["target"] = "—"
    return out


def fmt(value: Any, unit: str) -> str:
    """A value as the table shows it: thousands separators for rates, 2 decimals for times."""
    if value is None:
        return "—"
    if isinstance(value, str):
        return value
    if unit in ("ms", "s", "x"):
        return f"{value:,.2f} {unit}".replace(" x", "x")
    if unit == "MiB":
        return f"{value:,.1f} MiB"
    return f"{value:,.0f} {unit}".strip()


def median(values: Sequence[float]) -> float:
    return float(statistics.median(values))


def rates(n: int, run: Callable[[], object], repeats: int) -> list[float]:
    """Items per second of each of ``repeats`` timed calls of ``run`` (which handles ``n``)."""
    out = []
    for _ in range(repeats):
        start = time.perf_counter()
        run()
        out.append(n / (time.perf_counter() - start))
    return out


# -- CPUs -------------------------------------------------------------------------------------


def cpus() -> tuple[int, int]:
    """(server CPU, load-generator CPU): the two lowest CPUs this process may use."""
    allowed = sorted(os.sched_getaffinity(0))
    return allowed[0], allowed[-1]


@contextlib.contextmanager
def on_cpu(cpu: int) -> Iterator[None]:
    """Run this thread (and every process or thread it starts meanwhile) on one CPU."""
    before = os.sched_getaffinity(0)
    os.sched_setaffinity(0, {cpu})
    try:
        yield
    finally:
        os.sched_setaffinity(0, before)


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


# -- events -----------------------------------------------------------------------------------


def demo_events(n: int, seed: int) -> list[tuple[str, dict[str, Any], str]]:
    """``n`` invented listings (id, fields, label) from the demo traffic generator."""
    return ListingTraffic(seed=seed, shift_at=max(1, n // 2)).batch(n)


def model_body(name: str, *, bits: int = BITS, rule: str = "classic") -> dict[str, Any]:
    """A create-model body with the demo's feature spec."""
    return {
        "name": name,
        "classes": list(CLASSES),
        "features": DEMO_SPEC,
        "bits": bits,
        "rule": rule,
        "seed": SEED,
    }


# -- the machine ------------------------------------------------------------------------------


def machine(mode: Mode) -> dict[str, Any]:
    """Facts that go beside every result: cores, CPU model, versions, date, mode."""
    import aiohttp
    import numpy
    import sklearn

    model = platform.processor() or "unknown"
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
    commit = ""
    with contextlib.suppress(OSError, subprocess.SubprocessError):
        commit = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True, text=True
        ).stdout.strip()
    wrk = ""
    with contextlib.suppress(OSError, subprocess.SubprocessError):
        text = subprocess.run(["wrk", "-v"], capture_output=True, text=True).stdout
        wrk = (text.splitlines() or [""])[0].split(" [")[0]
    server_cpu, load_cpu = cpus()
    return {
        "date": datetime.datetime.now(datetime.UTC).strftime("%Y-%m-%d %H:%M UTC"),
        "mode": mode.name,
        "repeats": mode.repeats,
        "cores": os.cpu_count(),
        "cpu_model": model,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scikit_learn": sklearn.__version__,
        "aiohttp": aiohttp.__version__,
        "wrk": wrk,
        "server_cpu": server_cpu,
        "load_cpu": load_cpu,
        "commit": commit,
    }
