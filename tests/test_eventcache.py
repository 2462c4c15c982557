"""The scored-event cache: count, byte and TTL bounds, sweeps, checked against a naive list."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from thresher.errors import InvalidConfig
from thresher.eventcache import ENTRY_OVERHEAD, EventCache, estimate_size


def test_evicts_oldest_by_count() -> None:
    cache = EventCache(max_entries=3, ttl_seconds=100.0)
    for i in range(5):
        assert cache.put(f"e{i}", {"n": i}, i % 2, float(i), size=10)
    assert len(cache) == 3 and cache.evictions == 2
    assert cache.get("e0", 5.0) is None and cache.get("e1", 5.0) is None
    hit = cache.get("e4", 5.0)
    assert hit is not None and hit.fields == {"n": 4} and hit.served == 0 and hit.time == 4.0
    assert cache.bytes == 30


def test_rescoring_moves_an_id_to_the_young_end() -> None:
    cache = EventCache(max_entries=3, ttl_seconds=100.0)
    for i, key in enumerate("abc"):
        cache.put(key, {}, 0, float(i), size=1)
    cache.put("a", {"again": True}, 1, 3.0, size=5)
    cache.put("d", {}, 0, 4.0, size=1)
    assert "b" not in cache and "a" in cache
    entry = cache.get("a", 4.0)
    assert entry is not None and entry.served == 1 and entry.fields == {"again": True}
    assert cache.bytes == 5 + 1 + 1


def test_evicts_oldest_by_bytes() -> None:
    cache = EventCache(max_entries=100, max_bytes=100, ttl_seconds=100.0)
    cache.put("a", {}, 0, 0.0, size=40)
    cache.put("b", {}, 0, 1.0, size=40)
    assert cache.bytes == 80 and cache.evictions == 0
    cache.put("c", {}, 0, 2.0, size=40)
    assert "a" not in cache and cache.bytes == 80 and cache.evictions == 1
    cache.put("d", {}, 0, 3.0, size=100)  # exactly the bound: everyone else goes
    assert len(cache) == 1 and cache.bytes == 100 and cache.evictions == 3
    # One entry over the bound is refused rather than emptying the cache for nothing.
    assert cache.put("huge", {}, 0, 4.0, size=101) is False
    assert cache.oversize == 1 and "huge" not in cache and "d" in cache


def test_refused_replacement_drops_the_stale_entry() -> None:
    cache = EventCache(max_bytes=100, ttl_seconds=100.0)
    cache.put("a", {"v": 1}, 0, 0.0, size=10)
    assert cache.put("a", {"v": 2}, 1, 1.0, size=500) is False
    # The old fields no longer describe what was served last, so they must not linger.
    assert cache.get("a", 1.0) is None and cache.bytes == 0


def test_ttl_expires_lazily_on_get_and_pop() -> None:
    cache = EventCache(ttl_seconds=10.0)
    cache.put("a", {"x": 1}, 1, 100.0, size=8)
    cache.put("b", {"x": 2}, 0, 100.0, size=8)
    assert cache.get("a", 109.999) is not None
    assert cache.get("a", 110.0) is None  # alive for [t, t + ttl)
    assert cache.expiries == 1 and len(cache) == 1 and cache.bytes == 8
    assert cache.pop("b", 110.0) is None and cache.expiries == 2 and cache.bytes == 0
    cache.put("c", {}, 0, 200.0, size=8)
    popped = cache.pop("c", 205.0)
    assert popped is not None and popped.time == 200.0
    assert cache.pop("c") is None and len(cache) == 0
    assert cache.hits == 1 and cache.misses == 1


def test_put_drops_expired_entries_at_the_old_end() -> None:
    cache = EventCache(ttl_seconds=10.0)
    for i in range(5):
        cache.put(f"old{i}", {}, 0, float(i), size=8)
    cache.put("new", {}, 0, 12.5, size=8)
    assert cache.stats() == {"entries": 3, "bytes": 24, "evictions": 0, "expiries": 3,
                             "oversize": 0, "hits": 0, "misses": 0}  # fmt: skip


def test_sweep() -> None:
    cache = EventCache(ttl_seconds=10.0)
    cache.put("a", {}, 0, 0.0, size=1)
    cache.put("b", {}, 0, 5.0, size=1)
    cache.put("c", {}, 0, 9.0, size=1)
    assert cache.sweep(12.0) == 1 and len(cache) == 2
    # An entry stamped earlier than its older neighbour (clock stepped back) is still found.
    cache.put("d", {}, 0, 1.0, size=1)
    assert cache.sweep(14.0) == 1 and "d" not in cache and "b" in cache and "c" in cache
    assert cache.sweep(30.0) == 2 and len(cache) == 0 and cache.bytes == 0
    assert cache.expiries == 4 and cache.sweep(30.0) == 0


def test_estimated_size() -> None:
    fields = {"title": "red bicycle, barely used", "price": 120.5, "tags": ["bike", "red"],
              "seller": {"age_days": 3, "country": "NZ"}}  # fmt: skip
    estimate = estimate_size(fields)
    encoded = len(json.dumps(fields, separators=(",", ":")))
    # Within a factor of two of the compact JSON encoding (the standard library's json).
    assert encoded / 2 <= estimate <= encoded * 2
    assert estimate_size({"t": "x" * 1000}) > estimate_size({"t": "x" * 10}) + 900
    cache = EventCache(max_bytes=10_000, ttl_seconds=10.0)
    cache.put("id-1", fields, 0, 0.0)
    assert cache.bytes == estimate + len("id-1") + ENTRY_OVERHEAD
    for i in range(100):
        cache.put(f"big{i}", {"t": "x" * 1000}, 0, 0.0)
    assert cache.bytes <= 10_000 and cache.evictions > 0
    deep: Any = "leaf"
    for _ in range(50):
        deep = [deep]
    assert estimate_size({"deep": deep}) < 200  # deep nesting is charged flat, not recursed


@pytest.mark.parametrize(
    ("kwargs", "path"),
    [
        ({"max_entries": 0}, "max_entries"),
        ({"max_entries": 2.5}, "max_entries"),
        ({"max_bytes": -1}, "max_bytes"),
        ({"max_bytes": True}, "max_bytes"),
        ({"ttl_seconds": 0.0}, "ttl_seconds"),
        ({"ttl_seconds": float("nan")}, "ttl_seconds"),
        ({"ttl_seconds": "60"}, "ttl_seconds"),
    ],
)
def test_bad_bounds(kwargs: dict[str, Any], path: str) -> None:
    with pytest.raises(InvalidConfig) as err:
        EventCache(**kwargs)
    assert err.value.path == path


# -- against a naive reference: a list scanned front to back on every operation -------------


@dataclass
class NaiveCache:
    max_entries: int
    max_bytes: int
    ttl: float
    items: list[tuple[str, int, float, int]] = field(default_factory=list)

    def _alive(self, now: float) -> None:
        self.items = [i for i in self.items if now - i[2] < self.ttl]

    def put(self, key: str, served: int, now: float, size: int) -> None:
        self.items = [i for i in self.items if i[0] != key]
        if size > self.max_bytes:
            return
        # The real cache drops expired entries only from the old end; with non-decreasing
        # times (as generated below) that is all of them.
        self._alive(now)
        self.items.append((key, served, now, size))
        while len(self.items) > self.max_entries or sum(i[3] for i in self.items) > self.max_bytes:
            self.items.pop(0)

    def get(self, key: str, now: float) -> tuple[int, float] | None:
        self._alive(now)
        for k, served, t, _ in self.items:
            if k == key:
                return served, t
        return None


ops = st.lists(
    st.tuples(
        st.sampled_from(["put", "get", "sweep"]),
        st.integers(0, 12),  # id
        st.floats(0.0, 3.0),  # time step
        st.integers(0, 60),  # size
    ),
    max_size=80,
)


@settings(max_examples=300, deadline=None)
@given(
    max_entries=st.integers(1, 6),
    max_bytes=st.integers(1, 150),
    ttl=st.floats(0.5, 10.0),
    steps=ops,
)
def test_matches_naive_reference(
    max_entries: int, max_bytes: int, ttl: float, steps: list[tuple[str, int, float, int]]
) -> None:
    cache = EventCache(max_entries=max_entries, max_bytes=max_bytes, ttl_seconds=ttl)
    naive = NaiveCache(max_entries, max_bytes, ttl)
    now = 0.0
    for op, i, step, size in steps:
        now += step
        key = f"e{i}"
        if op == "put":
            cache.put(key, {"i": i}, i % 3, now, size=size)
            naive.put(key, i % 3, now, size)
        elif op == "get":
            got = cache.get(key, now)
            assert (None if got is None else (got.served, got.time)) == naive.get(key, now)
        else:
            cache.sweep(now)
            naive._alive(now)
            assert len(cache) == len(naive.items)
            assert cache.bytes == sum(item[3] for item in naive.items)
        assert len(cache) <= max_entries and cache.bytes <= max_bytes


_field_values = st.recursive(
    st.none()
    | st.booleans()
    | st.integers()  # beyond 64 bits too: msgpack cannot carry those
    | st.floats()  # NaN, infinities and -0.0 included
    | st.text(st.characters(codec=None), max_size=10)  # lone surrogates included
    | st.binary(max_size=8),
    lambda inner: (
        st.lists(inner, max_size=4)
        | st.tuples(inner, inner)
        | st.dictionaries(st.text(max_size=6), inner, max_size=4)
    ),
    max_leaves=20,
)


def _same(a: Any, b: Any) -> bool:
    """Equal with the same types all the way down; floats by their bits (NaN, -0.0)."""
    if type(a) is not type(b):
        return False
    if isinstance(a, dict):
        return list(a) == list(b) and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, list | tuple):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    if isinstance(a, float):
        return repr(a) == repr(b)
    return bool(a == b)


@settings(max_examples=300, deadline=None)
@given(st.dictionaries(st.text(max_size=8), _field_values, max_size=6))
def test_fields_come_back_exactly_as_put(fields: dict[str, Any]) -> None:
    cache = EventCache(ttl_seconds=100.0)
    cache.put("a", fields, 1, 0.0, size=10)
    cache.put("b", fields, 0, 0.0, size=10)
    got = cache.get("a", 1.0)
    assert got is not None and _same(got.fields, fields) and got.served == 1
    popped = cache.pop("b")
    assert popped is not None and _same(popped.fields, fields) and popped.served == 0


def test_entries_are_not_tracked_by_the_garbage_collector() -> None:
    import gc

    cache = EventCache(ttl_seconds=100.0)
    fields = {"title": "a phone", "tags": ["new", "boxed"], "price": 3.5, "seen": None}
    for i in range(1000):
        cache.put(f"e{i}", dict(fields), i % 2, 0.0, size=10)
    gc.collect()  # the collector untracks tuples whose items are all untracked
    held = gc.get_referents(cache._entries)  # the layout itself is what is tested here
    tracked = [x for x in held if gc.is_tracked(x)]
    assert len(held) == 2000 and tracked == []  # 1000 ids and 1000 entries
    got = cache.get("e7", 1.0)
    assert got is not None and got.fields == fields and got.served == 1


def test_a_refused_pack_leaves_the_reused_packer_empty() -> None:
    # The cache reuses one msgpack packer; one that failed halfway through an event must not
    # leave its bytes in front of the next event's.
    cache = EventCache(ttl_seconds=100.0)
    good = {"title": "a phone", "price": 3.5}
    cache.put("bad", {"title": "ok", "code": "\ud800", "n": 2**70}, 0, 0.0, size=10)
    cache.put("good", good, 1, 0.0, size=10)
    got = cache.get("good", 1.0)
    assert got is not None and _same(got.fields, good)
    bad = cache.get("bad", 1.0)
    assert bad is not None and bad.fields["code"] == "\ud800" and bad.fields["n"] == 2**70


@settings(max_examples=200, deadline=None)
@given(
    st.lists(
        st.lists(st.tuples(st.sampled_from("abcdefg"), st.integers(0, 2)), max_size=8),
        max_size=6,
    ),
    st.integers(1, 5),
    st.integers(10, 400),
    st.integers(0, 150),
)
def test_put_many_equals_put_in_turn(
    batches: list[list[tuple[str, int]]], max_entries: int, max_bytes: int, size: int
) -> None:
    # Repeated ids within a batch, bounds overflowing mid-batch, oversize charges and expiry
    # (each batch 40 s after the last, TTL 100 s): both must end alike, counters included.
    one = EventCache(max_entries=max_entries, max_bytes=max_bytes, ttl_seconds=100.0)
    many = EventCache(max_entries=max_entries, max_bytes=max_bytes, ttl_seconds=100.0)
    for step, batch in enumerate(batches):
        now = 40.0 * step
        items = [(event_id, {"n": served, "id": event_id}, served) for event_id, served in batch]
        for event_id, fields, served in items:
            one.put(event_id, fields, served, now, size)
        many.put_many(items, now, size)
        assert list(one._entries.items()) == list(many._entries.items())
        assert one.stats() == many.stats()
