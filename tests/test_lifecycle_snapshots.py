"""Snapshots the registry takes while labels keep arriving: each holds its offset's state."""

from __future__ import annotations

import asyncio
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from thresher import models, records
from thresher.demo_traffic import DEMO_MODEL, ListingTraffic
from thresher.errors import Unavailable
from thresher.eventcache import EventCache
from thresher.lifecycle import ModelRegistry
from thresher.models import Model
from thresher.settings import Settings


async def _registry(data_dir: Path) -> ModelRegistry:
    options = {"snapshot_interval": 0, "snapshot_every": 0, "snapshot_keep": 50}
    settings = Settings.from_mapping({"data_dir": str(data_dir), "flush": "interval", **options})
    registry = ModelRegistry(settings)
    await registry.open()
    return registry


def _labels(traffic: list[tuple[str, dict[str, Any], str]]) -> list[dict[str, Any]]:
    return [{"id": i, "label": label, "fields": fields} for i, fields, label in traffic]


async def _digests_at(model: Model, offsets: set[int]) -> dict[int, str]:
    """The digest a model that applied only the log's first ``n`` records has, for each n."""
    fresh = Model(model.config, model.log, cache=EventCache())
    found = {0: fresh.digest()} if 0 in offsets else {}
    async for offset, payload in model.log.read(0):
        fresh.apply(offset, records.decode(payload))
        if offset + 1 in offsets:
            found[offset + 1] = fresh.digest()
    return found


@pytest.mark.parametrize(
    "rule, classes",
    [("averaged", ["fine", "fraud"]), ("classic", ["fine", "fraud", "spam"])],
)
async def test_snapshots_during_label_traffic_hold_the_state_at_their_offset(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, rule: str, classes: list[str]
) -> None:
    registry = await _registry(tmp_path)
    model = await registry.create({**DEMO_MODEL, "bits": 16, "rule": rule, "classes": classes})
    name = model.name
    waiting: list[int] = []  # labels appended but not applied, seen from inside each capture
    real = models._capture_all

    def slow_capture(arrays: dict[str, np.ndarray], applied: Any) -> Any:
        time.sleep(0.02)  # the loop appends (and would apply) labels meanwhile
        waiting.append(model.log.head() - model.offset)
        return real(arrays, applied)

    monkeypatch.setattr(models, "_capture_all", slow_capture)
    traffic = ListingTraffic(seed=3).batch(1200)

    taking: list[asyncio.Future[Any]] = []

    async def send(part: list[tuple[str, dict[str, Any], str]]) -> None:
        for lo in range(0, len(part), 40):
            if lo % 120 == 0:  # a snapshot starts, then labels arrive while it is taken
                taking.append(asyncio.ensure_future(registry.snapshot(name)))
                await asyncio.sleep(0)  # it starts: applying is held from here
            await model.label(_labels(part[lo : lo + 40]), source="s", now=1.0)

    await asyncio.gather(send(traffic[:600]), send(traffic[600:]))
    infos = await asyncio.gather(*taking)
    assert max(waiting) > 0, "no label arrived while a capture held applying"
    offsets = {info.offset for info in infos}
    assert len(offsets - {0, 1200}) >= 2, offsets
    expected = await _digests_at(model, offsets)
    store = registry.stores[name]
    for info in infos:
        state = store.load(info.generation)
        assert state["offset"] == info.offset
        restored = Model(model.config, model.log, cache=EventCache())
        restored.load_state(state)
        assert restored.digest() == expected[info.offset], info
        assert len(restored.applied) == info.offset
    # Replaying the log from any snapshot gives the uninterrupted run.
    restored.load_state(store.load(infos[len(infos) // 2].generation))
    await registry.replay(restored)
    assert (restored.offset, restored.digest()) == (1200, model.digest())
    await registry.close(snapshot=False)


async def test_held_labels_are_appended_then_applied_and_scoring_goes_on(tmp_path: Path) -> None:
    registry = await _registry(tmp_path)
    model = await registry.create({**DEMO_MODEL, "bits": 12})
    traffic = ListingTraffic(seed=5).batch(30)
    model.hold()
    task = asyncio.ensure_future(model.label(_labels(traffic), source="s", now=1.0))
    while model.log.head() < 30:
        await asyncio.sleep(0.005)
    await asyncio.sleep(0.05)
    assert model.offset == 0 and not task.done()
    scored = model.score([{"fields": traffic[0][1]}], explain=0, now=1.0)
    assert scored[0]["label"] == "fine"  # an untrained binary model: a tie is negative
    model.resume()
    ack = await task
    assert (ack.applied, ack.offset, model.offset, model.holds) == (30, 30, 30, 0)
    await registry.close(snapshot=False)


async def test_capture_refuses_a_state_swapped_while_it_ran(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    registry = await _registry(tmp_path)
    model = await registry.create({**DEMO_MODEL, "bits": 12})
    await model.label(_labels(ListingTraffic(seed=6).batch(20)), source="s", now=1.0)
    real = models._capture_all
    started = asyncio.Event()
    loop = asyncio.get_running_loop()

    def slow_capture(arrays: dict[str, np.ndarray], applied: Any) -> Any:
        loop.call_soon_threadsafe(started.set)
        time.sleep(0.1)
        return real(arrays, applied)

    monkeypatch.setattr(models, "_capture_all", slow_capture)
    taking = asyncio.ensure_future(registry.snapshot(model.name))
    await started.wait()
    model.reset_learning()  # what a restore does to the learned state
    with pytest.raises(Unavailable, match="changed state while a snapshot was taken"):
        await taking
    assert model.holds == 0 and registry.stores[model.name].list() == []
    await registry.close(snapshot=False)


async def test_snapshots_by_label_count_are_spaced_by_the_applied_ids_they_write(
    tmp_path: Path,
) -> None:
    options = {"flush": "interval", "snapshot_interval": 0, "snapshot_every": 20}
    settings = Settings.from_mapping({"data_dir": str(tmp_path), **options})
    registry = ModelRegistry(settings)
    await registry.open()
    model = await registry.create({**DEMO_MODEL, "bits": 16})
    traffic = ListingTraffic(seed=5).batch(400)
    await model.label(_labels(traffic), source="t", now=1.0)
    assert len(model.applied) == 400
    # 20 labels since the last snapshot would write 400 ids: 20 per label, over the 8 allowed.
    assert not registry.note_applied(model.name, 20)
    assert not registry.note_applied(model.name, 29)  # 49 labels: 8.2 ids a label
    assert registry.note_applied(model.name, 1)  # 50 labels: 8 ids a label
    await registry.snapshot(model.name, automatic=True)
    unkeyed = [{"label": label, "fields": fields} for _, fields, label in traffic[:30]]
    await model.label(unkeyed, source="t", now=2.0)  # labels without ids add none
    assert not registry.note_applied(model.name, 19)
    assert registry.note_applied(model.name, 31)  # 50 labels since the snapshot
    await registry.close()
