"""A bounded cache of scored events by id, so a later label can name the event by id alone.

Bounded three ways: entry count, estimated bytes and age (TTL). The oldest entry goes first
when a bound is exceeded; insertion order is age order because a re-scored id moves to the
end. Expiry is lazy (a ``get`` or ``pop`` of an expired entry misses, and ``put`` drops expired
entries from the old end) plus an explicit :meth:`EventCache.sweep`. Pure: the caller passes
the time in, in seconds on any clock that does not step back.

Byte accounting: ``put(..., size=n)`` charges exactly ``n`` bytes for the whole entry; the
caller usually knows it cheaply (the request body's bytes per event, or the length of the
msgpack/JSON encoding it already did). Without ``size`` the cache estimates it with
:func:`estimate_size`.

Layout: a full cache holds 100,000 events, and as dicts and lists each would be several objects
the garbage collector walks on every full collection (pauses of hundreds of milliseconds). So
an entry is a plain tuple whose fields are packed as msgpack bytes: nothing in it is tracked by
the collector. ``get`` and ``pop`` unpack them into a :class:`CachedEvent`; fields msgpack
cannot carry exactly (integers beyond 64 bits, text with lone surrogates, other mappings) are
kept as the object itself.
"""

from __future__ import annotations

from collections import OrderedDict
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import msgpack

from .errors import InvalidConfig

MiB = 1024 * 1024
# A rough charge for the dict slot, the entry object and the id string's header (common
# practice: CPython objects cost tens of bytes each before their payload).
ENTRY_OVERHEAD = 120
_SCALAR = 8
# Containers nested deeper than this are charged as opaque; event fields are shallow.
_MAX_DEPTH = 8


@dataclass(slots=True)
class CachedEvent:
    """One scored event: its fields, the class index it was served, when, and its byte charge."""

    fields: Mapping[str, Any]
    served: int
    time: float
    size: int


# An entry: (fields as msgpack bytes or the mapping itself, served class, time, byte charge).
_Entry = tuple[bytes | Mapping[str, Any], int, float, int]
_FIELDS, _SERVED, _TIME, _SIZE = range(4)


def _pack(packer: msgpack.Packer, fields: Mapping[str, Any]) -> bytes | Mapping[str, Any]:
    if type(fields) is dict:
        try:
            # Exact types only: a tuple or a float subclass would come back as something else.
            packed: bytes = packer.pack(fields)
            return packed
        except (TypeError, ValueError, OverflowError):
            pass  # e.g. a lone surrogate or a huge integer: keep the object, exactly
    return fields


def _event(entry: _Entry) -> CachedEvent:
    stored = entry[_FIELDS]
    fields = (
        msgpack.unpackb(stored, raw=False, strict_map_key=False)
        if isinstance(stored, bytes)
        else stored
    )
    return CachedEvent(fields, entry[_SERVED], entry[_TIME], entry[_SIZE])


def estimate_size(value: Any, _depth: int = 0) -> int:
    """A cheap estimate of the payload bytes of a JSON-like value (str, number, list, dict)."""
    if isinstance(value, str | bytes):
        return len(value)
    if _depth >= _MAX_DEPTH:
        return _SCALAR
    if isinstance(value, Mapping):
        return sum(
            estimate_size(k, _depth + 1) + estimate_size(v, _depth + 1) + _SCALAR
            for k, v in value.items()
        )
    if isinstance(value, list | tuple | set | frozenset):
        return sum(estimate_size(v, _depth + 1) + _SCALAR for v in value)
    return _SCALAR


class EventCache:
    """Scored events by id, evicting the oldest past ``max_entries`` or ``max_bytes``."""

    def __init__(
        self,
        *,
        max_entries: int = 100_000,
        max_bytes: int = 64 * MiB,
        ttl_seconds: float = 3600.0,
    ) -> None:
        for name, value in (("max_entries", max_entries), ("max_bytes", max_bytes)):
            if isinstance(value, bool) or not isinstance(value, int) or value <= 0:
                raise InvalidConfig(f"{name} must be a positive integer, not {value!r}",
                                    path=name)  # fmt: skip
        if isinstance(ttl_seconds, bool) or not isinstance(ttl_seconds, int | float):
            raise InvalidConfig("ttl_seconds must be a number of seconds", path="ttl_seconds")
        if not ttl_seconds > 0:
            raise InvalidConfig("ttl_seconds must be greater than 0", path="ttl_seconds")
        self.max_entries = max_entries
        self.max_bytes = max_bytes
        self.ttl_seconds = float(ttl_seconds)
        # OrderedDict, not dict: popping the oldest of a plain dict rescans the deleted slots
        # at its front, which makes a full cache's put O(n) instead of O(1).
        self._entries: OrderedDict[str, _Entry] = OrderedDict()
        self._bytes = 0
        # One packer, reused: msgpack.packb builds a new one per call, which costs more than
        # packing a small event. It empties itself after every pack, and after a failed one.
        self._packer = msgpack.Packer(use_bin_type=True, strict_types=True)
        self.evictions = 0  # pushed out by the count or byte bound
        self.expiries = 0  # dropped for age
        self.oversize = 0  # not stored: one entry larger than max_bytes
        self.hits = 0
        self.misses = 0

    def __len__(self) -> int:
        return len(self._entries)

    def __contains__(self, event_id: object) -> bool:
        return event_id in self._entries

    @property
    def bytes(self) -> int:
        """The summed byte charge of the entries held."""
        return self._bytes

    def put(
        self,
        event_id: str,
        fields: Mapping[str, Any],
        served: int,
        now: float,
        size: int | None = None,
    ) -> bool:
        """Remember a scored event; False when it alone is larger than ``max_bytes``."""
        charge = (
            estimate_size(fields) + len(event_id) + ENTRY_OVERHEAD
            if size is None
            else max(0, int(size))
        )
        self.put_many([(event_id, fields, served)], now, charge)
        return charge <= self.max_bytes

    def put_many(
        self, items: Iterable[tuple[str, Mapping[str, Any], int]], now: float, size: int
    ) -> None:
        """:meth:`put` of each ``(event_id, fields, served)`` in turn, all at ``now`` and each
        charged ``size`` bytes: the same entries and counters, with less work per event."""
        charge = max(0, int(size))
        entries = self._entries
        if charge > self.max_bytes:
            for event_id, _, _ in items:
                old = entries.pop(event_id, None)
                if old is not None:
                    self._bytes -= old[_SIZE]
                self.oversize += 1
            return
        packer = self._packer
        expired = False
        for event_id, fields, served in items:
            old = entries.pop(event_id, None)
            if old is not None:
                self._bytes -= old[_SIZE]
            if not expired:  # the same ``now`` throughout: once is all put would do
                self._expire_front(now)
                expired = True
            entries[event_id] = (_pack(packer, fields), served, now, charge)
            self._bytes += charge
            while len(entries) > self.max_entries or self._bytes > self.max_bytes:
                self._drop_oldest()
                self.evictions += 1

    def get(self, event_id: str, now: float) -> CachedEvent | None:
        """The live entry for ``event_id``, or None (an expired one is dropped)."""
        entry = self._entries.get(event_id)
        if entry is None:
            self.misses += 1
            return None
        if self._expired(entry, now):
            self._remove(event_id, entry)
            self.expiries += 1
            self.misses += 1
            return None
        self.hits += 1
        return _event(entry)

    def pop(self, event_id: str, now: float | None = None) -> CachedEvent | None:
        """Remove and return the entry; with ``now``, an expired entry is dropped as a miss."""
        entry = self._entries.pop(event_id, None)
        if entry is None:
            return None
        self._bytes -= entry[_SIZE]
        if now is not None and self._expired(entry, now):
            self.expiries += 1
            return None
        return _event(entry)

    def sweep(self, now: float) -> int:
        """Drop every expired entry; returns how many went."""
        before = len(self._entries)
        self._expire_front(now)
        # Entries put with a time earlier than an older neighbour's (a caller's clock that
        # stepped back) can sit behind live ones; catch them with a full pass when needed.
        stale = [k for k, e in self._entries.items() if self._expired(e, now)]
        for key in stale:
            self._remove(key, self._entries[key])
        self.expiries += len(stale)
        return before - len(self._entries)

    def clear(self) -> None:
        """Forget every entry (counters are kept)."""
        self._entries.clear()
        self._bytes = 0

    def stats(self) -> dict[str, int]:
        """Entries, bytes and the counters, for metrics and the model summary."""
        return {
            "entries": len(self._entries),
            "bytes": self._bytes,
            "evictions": self.evictions,
            "expiries": self.expiries,
            "oversize": self.oversize,
            "hits": self.hits,
            "misses": self.misses,
        }

    # -- internals -------------------------------------------------------------------------

    def _expired(self, entry: _Entry, now: float) -> bool:
        return now - entry[_TIME] >= self.ttl_seconds

    def _remove(self, key: str, entry: _Entry) -> None:
        del self._entries[key]
        self._bytes -= entry[_SIZE]

    def _drop_oldest(self) -> None:
        _, entry = self._entries.popitem(last=False)
        self._bytes -= entry[_SIZE]

    def _expire_front(self, now: float) -> None:
        # Amortised O(1): each entry is dropped at most once, and the scan stops at the first
        # live entry because insertion order is age order.
        entries = self._entries
        while entries:
            entry = entries[next(iter(entries))]
            if not self._expired(entry, now):
                return
            self._drop_oldest()
            self.expiries += 1
