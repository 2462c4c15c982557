"""The applied-id index: a dict's answers, bit-identical kernels, retention, snapshots."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import mmh3
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from thresher import appliedids, snapshot_format
from thresher.appliedids import AppliedIds, IdTable, capacity_for, id_hash, id_key
from thresher.demo_traffic import DEMO_MODEL, ListingTraffic
from thresher.errors import Conflict, InvalidConfig
from thresher.eventcache import EventCache
from thresher.labellog import FileLog
from thresher.lifecycle import ModelRegistry
from thresher.models import Model, ModelConfig
from thresher.settings import Settings
from thresher.snapshots import SnapshotStore

# A small alphabet makes repeats (duplicates, relabels) common; lone surrogates are ids too.
IDS = st.text(alphabet="ab\u00e9\U0001f600\ud800", min_size=0, max_size=6)
OPS = st.lists(st.tuples(IDS, st.integers(0, 3)), max_size=300)


def _arrays(ids: AppliedIds) -> list[tuple[bytes, bytes, bytes, int]]:
    return [(t.h1.tobytes(), t.h2.tobytes(), t.cls.tobytes(), t.count) for t in ids.tables()]


@given(st.text(max_size=40))
def test_the_hash_is_murmur3_x64_128_of_the_utf8(text: str) -> None:
    # mmh3 (the registry's MurmurHash3 binding) is the published hash's reference here.
    data = text.encode("utf-8", "surrogatepass")
    assert id_hash(text) == mmh3.hash64(data, 0, x64arch=True, signed=False)
    h1, h2 = id_hash(text)
    assert id_key(text) == h1.to_bytes(8, "big") + h2.to_bytes(8, "big")


@settings(max_examples=200, deadline=None)
@given(OPS, st.sampled_from([None, 1, 3, 40]))
def test_answers_as_a_dict_within_its_window(
    ops: list[tuple[str, int]], window: int | None
) -> None:
    ids = AppliedIds(window)
    # The naive reference: two dict generations, rotated when the current one holds N ids.
    current: dict[str, int] = {}
    previous: dict[str, int] = {}
    for event_id, y in ops:
        ids[event_id] = y
        if event_id not in current:
            current[event_id] = y
            if window is not None and len(current) >= window:
                previous, current = current, {}
        else:
            current[event_id] = y
        for probe in {event_id, "a", "b", "ab", "\ud800"}:
            expected = current.get(probe, previous.get(probe))
            assert ids.get(probe) == expected
            assert (probe in ids) == (expected is not None)
        assert len(ids) == len(current.keys() | previous.keys())
    if window is None:
        assert all(ids[k] == v for k, v in current.items())
    with pytest.raises(KeyError):
        ids["never set"]


@settings(max_examples=80, deadline=None)
@given(OPS, st.sampled_from([None, 2, 17]), st.integers(0, 300))
def test_the_compiled_path_leaves_the_reference_arrays(
    ops: list[tuple[str, int]], window: int | None, split: int
) -> None:
    native, batched = AppliedIds(window), AppliedIds(window)
    reference = AppliedIds(window, native=False)
    for event_id, y in ops:
        native[event_id] = y
        reference[event_id] = y
        assert native.get(event_id) == reference.get(event_id) == y
    # update() puts runs of pairs in one compiled call, stopping to rotate or grow.
    batched.update(ops[:split])
    batched.update(iter(ops[split:]))
    assert _arrays(native) == _arrays(reference) == _arrays(batched)
    assert native.shadowed == reference.shadowed == batched.shadowed


def test_update_hands_what_it_cannot_take_to_the_reference() -> None:
    ids = AppliedIds(3)
    ids.update([("a", 1), ("\ud800", 2), ("b", 0), ("c", 1), ("d", 0)])
    assert [ids.get(k) for k in ("a", "\ud800", "b", "c", "d")] == [1, 2, 0, 1, 0]
    assert ids.current.count == 2 and ids.previous is not None and ids.previous.count == 3
    with pytest.raises(TypeError, match="must be a str"):
        ids.update([("e", 1), (7, 1)])  # type: ignore[list-item]
    with pytest.raises(ValueError, match="class index"):
        ids.update([("f", -1)])
    assert ids.get("e") == 1 and "f" not in ids


def test_growth_and_collisions_match_the_reference() -> None:
    # Enough ids to grow past MIN_CAPACITY twice, and a tiny table where every id collides.
    keys = [f"event-{i}" for i in range(3 * appliedids.MIN_CAPACITY)]
    native, reference = AppliedIds(), AppliedIds(native=False)
    native.update((k, i % 5) for i, k in enumerate(keys))
    for i, k in enumerate(keys):
        reference[k] = i % 5
    assert native.current.capacity == reference.current.capacity == 4 * appliedids.MIN_CAPACITY
    assert _arrays(native) == _arrays(reference) and len(native) == len(keys)
    assert all(native.get(k) == i % 5 for i, k in enumerate(keys))
    small = [IdTable(8), IdTable(8, native=False)]
    for table in small:
        for k in keys[:6]:
            assert table.put(k, 2)
        assert not table.put(keys[0], 1)
        assert [table.find(k) for k in keys[:7]] == [1, 2, 2, 2, 2, 2, -1]
    assert small[0].cls.tobytes() == small[1].cls.tobytes()
    with pytest.raises(ValueError, match="class index"):
        native["x"] = -1


@pytest.mark.parametrize("window", [1, 5, 100])
def test_a_retry_is_known_at_least_n_and_at_most_2n_ids_back(window: int) -> None:
    ids = AppliedIds(window)
    for i in range(7 * window):
        ids[f"id-{i}"] = 1
        back = [i - k for k in range(window)]  # the last N ids set
        assert all(ids.get(f"id-{j}") == 1 for j in back if j >= 0)
        assert f"id-{i - 2 * window}" not in ids
        assert len(ids) <= 2 * window
    assert ids.current.capacity == capacity_for(window)


def test_a_window_needs_a_positive_count() -> None:
    with pytest.raises(ValueError, match="positive"):
        AppliedIds(0)


@settings(max_examples=60, deadline=None)
@given(OPS, st.integers(0, 300), st.sampled_from([None, 4, 30]))
def test_a_snapshot_then_the_rest_equals_one_run(
    ops: list[tuple[str, int]], split: int, window: int | None
) -> None:
    """Replicas and replays that resume from a snapshot hold the same index at each offset."""
    whole = AppliedIds(window)
    whole.update(ops)
    first = AppliedIds(window)
    first.update(ops[:split])
    state = snapshot_format.decode(snapshot_format.encode({"applied": first.state()}))
    resumed = AppliedIds.from_state(state["applied"], window=window)
    assert all(t._fast is not None for t in resumed.tables())  # loaded arrays take the C path
    resumed.update(ops[split:])
    assert _arrays(resumed) == _arrays(whole) and resumed == whole


def _state_arrays(ids: AppliedIds) -> list[tuple[int, str, bytes, bytes, bytes]]:
    return [
        (t["count"], t["cls"].dtype.str, t["cls"].tobytes(), t["h1"].tobytes(), t["h2"].tobytes())
        for t in ids.state()["tables"]
    ]


@settings(max_examples=60, deadline=None)
@given(OPS, st.sampled_from([None, 3, 40]), st.sampled_from([0, 250, 300]))
def test_the_compiled_state_gather_leaves_the_reference_arrays(
    ops: list[tuple[str, int]], window: int | None, shift: int
) -> None:
    # Class indices past a byte keep int32 ``cls``: the compiled gather hands those back.
    ops = [(event_id, y + shift) for event_id, y in ops]
    native, reference = AppliedIds(window), AppliedIds(window, native=False)
    native.update(ops)
    reference.update(ops)
    assert _state_arrays(native) == _state_arrays(reference)
    assert all(t["cls"].dtype == (np.uint8 if shift < 255 else np.int32)
               for t in native.state()["tables"] if t["count"])  # fmt: skip


def test_the_state_gather_refuses_outputs_that_do_not_fit() -> None:
    ids = AppliedIds()
    ids.update((f"id-{i}", 1) for i in range(100))
    table = ids.current
    args = (table.h1, table.h2, table.cls)
    room = np.empty(table.capacity, np.uint8)
    fits = [np.empty(100, np.uint64), np.empty(100, np.uint64), room]
    assert appliedids._appliedids.gather(*args, *fits) is True
    assert np.array_equal(fits[2], table.cls.astype(np.uint8))
    for short in (99, 101):  # a count that does not match the used slots
        wrong = [np.empty(short, np.uint64), np.empty(short, np.uint64), room]
        assert appliedids._appliedids.gather(*args, *wrong) is None
    other = [np.empty(100, np.int64), np.empty(100, np.uint64), room]
    assert appliedids._appliedids.gather(*args, *other) is None
    assert appliedids._appliedids.gather(*args, *fits[:2], room[:-1]) is None


def test_a_snapshot_under_another_window_keeps_every_id() -> None:
    ids = AppliedIds()
    ids.update((f"id-{i}", i % 2) for i in range(50))
    narrowed = AppliedIds.from_state(ids.state(), window=10)
    assert narrowed.previous is not None and len(narrowed) == 50
    assert all(narrowed.get(f"id-{i}") == i % 2 for i in range(50))
    narrowed.update((f"new-{i}", 0) for i in range(10))  # one rotation drops the old ids
    assert "id-0" not in narrowed and "new-0" in narrowed and len(narrowed) == 10
    widened = AppliedIds.from_state(narrowed.state(), window=None)
    assert widened.previous is None and len(widened) == 10 and widened.get("new-9") == 0


@pytest.mark.parametrize(
    "damage",
    [
        lambda s: s.update(format=9),
        lambda s: s["tables"][0].update(h1=s["tables"][0]["h1"].astype(np.int64)),
        lambda s: s["tables"][0].update(cls=s["tables"][0]["cls"][:-1]),
        lambda s: s["tables"][0].update(h2=s["tables"][0]["h2"][:-1]),
        lambda s: s["tables"][0].update(cls=s["tables"][0]["cls"].astype(np.int64)),
        lambda s: s["tables"][0].update(count=s["tables"][0]["count"] + 1),
        lambda s: s.update(tables=[]),
    ],
)
def test_a_damaged_state_is_refused(damage: Any) -> None:
    ids = AppliedIds()
    ids.update([("a", 1), ("b", 0)])
    state = ids.state()
    damage(state)
    with pytest.raises(snapshot_format.CorruptSnapshot):
        AppliedIds.from_state(state)


def _config() -> ModelConfig:
    return ModelConfig.from_json(dict(DEMO_MODEL), created=0.0)


def _labels(n: int) -> list[dict[str, Any]]:
    traffic = ListingTraffic(seed=5).batch(n)
    return [{"id": i, "label": label, "fields": fields} for i, fields, label in traffic]


async def test_a_snapshot_written_in_the_old_format_loads(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log", flush="interval")
    model = Model(_config(), log, cache=EventCache())
    labels = _labels(300)
    await model.label(labels, source="s", now=1.0)
    # What a build before format 2 wrote: the applied ids as an id -> class map.
    old = model.state()
    old.update(format=1, applied={item["id"]: model.class_index[item["label"]] for item in labels})
    store = SnapshotStore(tmp_path / "snapshots")
    info = store.write(old, offset=old["offset"], time=1.0)
    for window in (None, 100):
        loaded = Model(_config(), log, cache=EventCache(), applied_window=window)
        loaded.load_state(store.load(info.generation))
        assert len(loaded.applied) == 300 and loaded.digest() == model.digest()
        again = await loaded.label(labels[:50], source="s", now=2.0)
        assert (again.applied, again.duplicates) == (0, 50)
        flipped = dict(labels[0], label="fraud" if labels[0]["label"] == "fine" else "fine")
        with pytest.raises(Conflict):
            await loaded.label([flipped], source="s", now=2.0)
    await log.close()


async def test_a_windowed_model_trains_an_old_retry_again(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log", flush="interval")
    model = Model(_config(), log, cache=EventCache(), applied_window=40)
    labels = _labels(200)
    await model.label(labels, source="s", now=1.0)
    newest = await model.label(labels[-40:], source="s", now=2.0)
    oldest = await model.label(labels[:1], source="s", now=2.0)
    assert (newest.applied, newest.duplicates) == (0, 40)
    assert (oldest.applied, oldest.duplicates) == (1, 0)  # 200 ids back: past 2N, trained again
    restored = Model(_config(), log, cache=EventCache(), applied_window=40)
    restored.load_state(snapshot_format.decode(snapshot_format.encode(await model.capture())))
    assert restored.applied == model.applied and len(model.applied) <= 80
    await log.close()


async def test_the_window_setting_reaches_every_model_and_survives_a_restart(
    tmp_path: Path,
) -> None:
    with pytest.raises(InvalidConfig, match="applied_window"):
        Settings.from_mapping({"applied_window": -1})
    settings = Settings.from_mapping(
        {"data_dir": str(tmp_path), "flush": "interval", "snapshot_interval": 0,
         "snapshot_every": 0, "applied_window": 30}
    )  # fmt: skip
    registry = ModelRegistry(settings)
    await registry.open()
    model = await registry.create(dict(DEMO_MODEL))
    await model.label(_labels(100), source="s", now=1.0)
    # 90 ids filled three generations of 30: 10 in the current one, 30 in the previous.
    assert model.applied.window == 30 and len(model.applied) == 40
    await registry.snapshot(model.name)
    held = model.applied
    await registry.close()
    reopened = ModelRegistry(settings)
    await reopened.open()
    assert reopened.get(model.name).applied == held
    await reopened.close(snapshot=False)
