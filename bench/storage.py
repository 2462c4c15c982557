"""Figures 7a-b and 8: snapshot write and load at bits=24, and recovery replay from the log.

Both go through the service's own owners of the files: ``ModelRegistry`` (create, snapshot,
open) and ``SnapshotStore`` (write, load_newest), in a temporary data directory. Loads read
files the write just made, so they come from the page cache, as after a quick restart.
"""

from __future__ import annotations

import asyncio
import tempfile
import time
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import Any

import numpy as np

from thresher.lifecycle import REPLAY_CHUNK, ModelRegistry
from thresher.settings import Settings

from .common import Mode, demo_events, median, model_body, row

MODEL = "bench"
SNAPSHOT_TRAIN = {"quick": 3000, "full": 10000}
REPLAY = {"quick": 20_000, "full": 100_000}


def _settings(data_dir: Path) -> Settings:
    # No timer or count snapshots: the bench decides when one is written.
    return Settings.from_mapping(
        {"data_dir": str(data_dir), "snapshot_interval": 0, "snapshot_every": 0}
    )


async def _timed(call: Callable[[], Awaitable[Any]]) -> float:
    start = time.perf_counter()
    await call()
    return time.perf_counter() - start


async def _label(registry: ModelRegistry, n: int, seed: int) -> None:
    model = registry.get(MODEL)
    listings = demo_events(n, seed=seed)
    for lo in range(0, n, 1000):
        labels = [
            {"id": event_id, "label": label, "fields": fields}
            for event_id, fields, label in listings[lo : lo + 1000]
        ]
        await model.label(labels, source="bench", now=time.time())


async def _snapshots(
    mode: Mode, data_dir: Path, rule: str, dense: bool
) -> tuple[list[float], list[float], int]:
    """Write and load times (seconds) of one bits=24 model's snapshot, over the repeats."""
    registry = ModelRegistry(_settings(data_dir))
    await registry.open()
    try:
        await registry.create(model_body(MODEL, bits=24, rule=rule))
        await _label(registry, SNAPSHOT_TRAIN[mode.name], seed=21)
        model = registry.get(MODEL)
        if dense:  # the worst case: every weight nonzero, so the file is stored dense
            rng = np.random.default_rng(0)
            for array in (model.learner.weights_, model.learner.accum_):
                if array is not None:
                    array[:] = rng.standard_normal(array.shape, dtype=np.float32)
        store = registry.stores[MODEL]
        writes: list[float] = []
        loads: list[float] = []
        for _ in range(max(3, mode.repeats)):
            writes.append(await _timed(lambda: registry.snapshot(MODEL)))

            async def load() -> None:
                state, _info, _skipped = await asyncio.to_thread(store.load_newest)
                model.load_state(state)

            loads.append(await _timed(load))
        size = store.list()[0].bytes
    finally:
        await registry.close(snapshot=False)
    return writes, loads, size


def snapshot_rows(mode: Mode) -> list[dict[str, Any]]:
    """Rows 7a (write) and 7b (load) for a trained model and dense worst cases."""
    rows = []
    cases = [
        ("classic, trained", "classic", False),
        ("classic, dense worst case", "classic", True),
        ("averaged, dense worst case", "averaged", True),
    ]
    for label, rule, dense in cases:
        with tempfile.TemporaryDirectory(prefix="bench-snap-") as tmp:
            writes, loads, size = asyncio.run(_snapshots(mode, Path(tmp), rule, dense))
        note = f"file {size / 2**20:.1f} MiB; write includes the state capture, fsync and rename"
        rows.append(
            row(
                f"7a. snapshot write, bits=24 {label}",
                median(writes),
                "s",
                target=("value<=", 1.0),
                note=note,
                samples=writes,
            )
        )
        rows.append(
            row(
                f"7b. snapshot load, bits=24 {label}",
                median(loads),
                "s",
                target=("value<=", 1.0),
                note="load_newest (checksums verified) + load_state",
                samples=loads,
            )
        )
    return rows


async def _write_log(data_dir: Path, n: int) -> None:
    """A model whose log holds ``n`` label records, written by label requests, and which has
    no snapshot."""
    registry = ModelRegistry(_settings(data_dir))
    await registry.open()
    await registry.create(model_body(MODEL, rule="classic"))
    await _label(registry, n, seed=31)
    await registry.close(snapshot=False)


async def _open_time(data_dir: Path, n: int) -> float:
    registry = ModelRegistry(_settings(data_dir))
    elapsed = await _timed(registry.open)
    offset = registry.get(MODEL).offset
    await registry.close(snapshot=False)
    if offset != n:
        raise RuntimeError(f"replay reached offset {offset}, expected {n}")
    return elapsed


def replay_rows(mode: Mode) -> list[dict[str, Any]]:
    """Row 8: labels per second that ModelRegistry.open() replays from a log."""
    n = REPLAY[mode.name]
    with tempfile.TemporaryDirectory(prefix="bench-replay-") as tmp:
        data_dir = Path(tmp)
        asyncio.run(_write_log(data_dir, n))
        times = [asyncio.run(_open_time(data_dir, n)) for _ in range(max(1, mode.repeats))]
    rates = [n / t for t in times]
    return [
        row(
            "8. recovery replay (ModelRegistry.open, no snapshot)",
            median(rates),
            "labels/s",
            target=("value>=", 100_000),
            note=f"{n:,} demo labels in the log, written by label requests; replay takes the "
            f"last segment recovery checked and applies runs of {REPLAY_CHUNK:,}: decoded as "
            "one msgpack stream, fields left packed, the rows stored at label time learned in "
            "one kernel call, quality counted in one loop",
            samples=rates,
        )
    ]


def replay_workload(seconds: float) -> None:
    """Replay a log over and over for about ``seconds``: a target for the profiler."""
    with tempfile.TemporaryDirectory(prefix="bench-replay-") as tmp:
        data_dir = Path(tmp)
        asyncio.run(_write_log(data_dir, 20_000))
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline:
            asyncio.run(_open_time(data_dir, 20_000))
