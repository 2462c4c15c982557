"""The applied-id index: the class applied for each event id, for exactly-once training.

`AppliedIds` answers like the ``dict[str, int]`` it replaces (``get``, ``in``, ``[]``,
``[]=``, ``update``, ``len``) but keeps no strings. An id is kept as the 128 bits of
MurmurHash3_x64_128 (seed 0) of its UTF-8 bytes, ``(h1, h2)``, in an open-addressing table
of three numpy arrays: ``h1``, ``h2`` (uint64) and ``cls`` (int32, class index + 1; 0 is an
empty slot). The home slot is ``h1 mod capacity`` (a power of two), collisions probe
linearly, and a table is at most 3/4 full: 20 bytes a slot, 27 to 53 bytes an id. A snapshot
stores each table as three arrays, each one blob: ``cls`` whole (as uint8 when the classes
fit, so about 2 bytes an id) and ``h1``, ``h2`` of the used slots in slot order (16 bytes an
id). Taking them is a gather a worker thread does; loading is a scatter back into the same
slots, so a loaded table is bit-identical to the one saved. No map is ever packed.

Two distinct ids share all 128 bits with probability below n(n - 1) / 2**129 (the birthday
bound): about 1.5e-21 for a billion ids. If it happened, the second id would count as a
duplicate of (or conflict with) the first.

Retention: ``window=None`` keeps every id forever. ``window=N`` keeps two generations: new
ids go to the current table; when it holds N ids it becomes the previous one and the table
before it is dropped. A retry is recognised while its id is in either, at least N and at most
2N applied ids back; an older retry is trained again. Rotation depends only on the order ids
are set in, which is log order, so every replica and every replay of one log hold the same
index at the same offset.

``_appliedids.c`` is the compiled fast path of find, put and grow; the Python beside it is its
reference, and both leave bit-identical arrays (tests/test_appliedids.py).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

import mmh3
import numpy as np

from .snapshot_format import CorruptSnapshot

try:  # the compiled fast path (_appliedids.c); the Python below is its reference
    from . import _appliedids
except ImportError:  # pragma: no cover - a build without the C extension
    _appliedids = None  # type: ignore[assignment]

FORMAT = 1  # the layout of `AppliedIds.state`
MIN_CAPACITY = 1024
MAX_CLASS = (1 << 31) - 2  # the largest class index a slot's int32 ``cls`` holds


def _reference_hash(event_id: str) -> tuple[int, int]:
    if not isinstance(event_id, str):
        raise TypeError(f"an applied id must be a str, not {type(event_id).__name__}")
    # surrogatepass: an id that is not valid UTF-8 (lone surrogates) is still hashed, as
    # the dict this replaces kept it.
    data = event_id.encode("utf-8", "surrogatepass")
    return mmh3.hash64(data, 0, x64arch=True, signed=False)


def id_hash(event_id: str) -> tuple[int, int]:
    """``(h1, h2)``: MurmurHash3_x64_128, seed 0, of the id's UTF-8 bytes."""
    if _appliedids is not None:
        made = _appliedids.hash128(event_id)
        if made is not None:
            return made  # type: ignore[no-any-return]
    return _reference_hash(event_id)


def id_key(event_id: str) -> bytes:
    """The 16 bytes an id is known by outside this process (the Redis id hashes)."""
    h1, h2 = id_hash(event_id)
    return h1.to_bytes(8, "big") + h2.to_bytes(8, "big")


def capacity_for(count: int) -> int:
    """The smallest power-of-two capacity, at least `MIN_CAPACITY`, that holds ``count`` ids."""
    capacity = MIN_CAPACITY
    while count * 4 > capacity * 3:
        capacity *= 2
    return capacity


class IdTable:
    """One open-addressing table of id hashes and classes; see the module docstring."""

    __slots__ = ("_fast", "cls", "count", "h1", "h2", "native")

    def __init__(self, capacity: int, *, native: bool = True) -> None:
        if capacity < 1 or capacity & (capacity - 1):
            raise ValueError(f"a table's capacity must be a power of two, not {capacity}")
        self.h1 = np.zeros(capacity, np.uint64)
        self.h2 = np.zeros(capacity, np.uint64)
        self.cls = np.zeros(capacity, np.int32)
        self.count = 0
        self.native = native
        self._hold()

    def _hold(self) -> None:
        # The compiled table holds the arrays (they never change size), or None: reference.
        fast = None
        if self.native and _appliedids is not None:
            try:
                fast = _appliedids.Table(self.h1, self.h2, self.cls)
            except TypeError:  # arrays it does not take (a read-only view...)
                fast = None
        self._fast = fast

    @property
    def capacity(self) -> int:
        return int(self.cls.shape[0])

    @property
    def nbytes(self) -> int:
        return int(self.h1.nbytes + self.h2.nbytes + self.cls.nbytes)

    def full(self) -> bool:
        """Whether one more id would take the table past 3/4 full."""
        return (self.count + 1) * 4 > self.capacity * 3

    def find(self, event_id: str) -> int:
        """The class index stored for ``event_id``, or -1."""
        if self._fast is not None:
            made = self._fast.find(event_id)
            if made is not None:
                return int(made)
        slot = self._slot(*_reference_hash(event_id))
        return int(self.cls[slot]) - 1

    def put(self, event_id: str, y: int) -> bool:
        """Store class ``y`` for ``event_id``; True when the id is new to this table."""
        if not 0 <= y <= MAX_CLASS:
            raise ValueError(f"a class index must be 0 to {MAX_CLASS}, not {y}")
        if self._fast is not None:
            made = self._fast.put(event_id, y)
            if made is not None:
                self.count += made
                return bool(made)
        h1, h2 = _reference_hash(event_id)
        slot = self._slot(h1, h2)
        fresh = self.cls[slot] == 0
        self.h1[slot], self.h2[slot], self.cls[slot] = h1, h2, y + 1
        self.count += int(fresh)
        return bool(fresh)

    def _slot(self, h1: int, h2: int) -> int:
        mask = self.capacity - 1
        slot = h1 & mask
        for _ in range(self.capacity):
            if self.cls[slot] == 0 or (int(self.h1[slot]) == h1 and int(self.h2[slot]) == h2):
                return slot
            slot = (slot + 1) & mask
        raise RuntimeError("applied-id table is full; it must grow before a put")

    def merged_into(self, other: IdTable) -> None:
        """Put every entry of this table into ``other`` (its own entries of an id are replaced)."""
        if other.native and _appliedids is not None:
            made = _appliedids.rehash(self.h1, self.h2, self.cls, other.h1, other.h2, other.cls)
            if made is not None:
                other.count = int(np.count_nonzero(other.cls))
                return
        for k in np.flatnonzero(self.cls).tolist():
            h1, h2 = int(self.h1[k]), int(self.h2[k])
            slot = other._slot(h1, h2)
            other.count += int(other.cls[slot] == 0)
            other.h1[slot], other.h2[slot], other.cls[slot] = h1, h2, self.cls[k]

    def grown(self) -> IdTable:
        """A table of twice the capacity holding the same entries."""
        bigger = IdTable(self.capacity * 2, native=self.native)
        self.merged_into(bigger)
        return bigger

    def entries(self) -> np.ndarray:
        """(h1, h2, class index) of every entry, sorted: what two equal tables share."""
        used = np.flatnonzero(self.cls)
        rows = np.stack(
            [self.h1[used], self.h2[used], self.cls[used].astype(np.uint64) - np.uint64(1)], axis=1
        )
        return rows[np.lexsort((rows[:, 2], rows[:, 1], rows[:, 0]))]

    def keys(self) -> tuple[list[bytes], list[int]]:
        """Each entry's 16-byte key (as `id_key`) and class index, in slot order."""
        used = np.flatnonzero(self.cls)
        pairs = np.stack([self.h1[used], self.h2[used]], axis=1).astype(">u8")
        raw = pairs.tobytes()
        return [raw[k : k + 16] for k in range(0, len(raw), 16)], (self.cls[used] - 1).tolist()

    def state(self) -> dict[str, Any]:
        """The table for a snapshot, in new arrays: ``cls`` whole, the used slots' hashes."""
        if self._fast is not None:  # one compiled pass instead of five numpy ones
            h1 = np.empty(self.count, np.uint64)
            h2 = np.empty(self.count, np.uint64)
            kept = np.empty(self.capacity, np.uint8)
            if _appliedids.gather(self.h1, self.h2, self.cls, h1, h2, kept):
                return {"count": self.count, "cls": kept, "h1": h1, "h2": h2}
        used = np.flatnonzero(self.cls)
        small = self.count == 0 or int(self.cls.max()) <= np.iinfo(np.uint8).max
        kept = self.cls.astype(np.uint8) if small else self.cls.copy()
        return {"count": self.count, "cls": kept, "h1": self.h1[used], "h2": self.h2[used]}

    @classmethod
    def from_state(cls, state: Any, *, native: bool = True) -> IdTable:
        """The table a snapshot's :meth:`state` saved; CorruptSnapshot when it does not fit."""
        if not isinstance(state, Mapping) or not {"count", "h1", "h2", "cls"} <= set(state):
            raise CorruptSnapshot("snapshot holds a malformed applied-id table")
        kept, h1, h2 = state["cls"], state["h1"], state["h2"]
        if not (
            isinstance(kept, np.ndarray) and kept.ndim == 1 and kept.dtype in (np.uint8, np.int32)
            and all(isinstance(h, np.ndarray) and h.ndim == 1 and h.dtype == np.uint64
                    for h in (h1, h2))
        ):  # fmt: skip
            raise CorruptSnapshot("snapshot holds applied-id arrays of the wrong type")
        size = kept.shape[0]
        if size < 1 or size & (size - 1) or (kept.size and int(kept.min()) < 0):
            raise CorruptSnapshot("snapshot holds an applied-id table of an impossible shape")
        used = np.flatnonzero(kept)
        if not used.size == h1.size == h2.size == state["count"] or used.size * 4 > size * 3:
            raise CorruptSnapshot("snapshot holds an applied-id table with a wrong count")
        table = cls(size, native=native)
        table.cls[:] = kept
        table.h1[used], table.h2[used] = h1, h2
        table.count = int(used.size)
        return table


class AppliedIds:
    """Event id -> class index, with optional generational retention; see the module doc."""

    __iter__ = None  # ids are kept only as hashes: there is nothing to iterate over

    def __init__(self, window: int | None = None, *, native: bool = True) -> None:
        if window is not None and (not isinstance(window, int) or window < 1):
            raise ValueError(f"an applied-id window must be a positive count or None: {window!r}")
        self.window = window
        self.native = native
        self.current = IdTable(capacity_for(window or 0), native=native)
        self.previous: IdTable | None = None
        # Ids in the current table that the previous one also holds: counted once by len.
        self.shadowed = 0

    def get(self, event_id: str, default: int | None = None) -> int | None:
        # Called for every labelled id: the compiled find first, without IdTable.find's frame.
        current = self.current
        y = None if current._fast is None else current._fast.find(event_id)
        if y is None:
            y = current.find(event_id)
        if y < 0 and self.previous is not None:
            y = self.previous.find(event_id)
        return default if y < 0 else y

    def __contains__(self, event_id: object) -> bool:
        return isinstance(event_id, str) and self.get(event_id) is not None

    def __getitem__(self, event_id: str) -> int:
        y = self.get(event_id)
        if y is None:
            raise KeyError(event_id)
        return y

    def __setitem__(self, event_id: str, y: int) -> None:
        if self.current.full():
            self.current = self.current.grown()
        if not self.current.put(event_id, y):
            return
        if self.previous is not None and self.previous.find(event_id) >= 0:
            self.shadowed += 1
        self._rotate_if_due()

    def _rotate_if_due(self) -> None:
        # On the count of ids set, which follows log order alone (deterministic).
        if self.window is not None and self.current.count >= self.window:
            self.previous = self.current
            self.current = IdTable(capacity_for(self.window), native=self.native)
            self.shadowed = 0

    def update(self, pairs: Iterable[tuple[str, int]]) -> None:
        """Set each ``(id, class index)`` in order, as ``dict.update`` with pairs."""
        items = pairs if isinstance(pairs, list) else list(pairs)
        at = 0
        while at < len(items):
            current, previous = self.current, self.previous
            fast = current._fast
            if fast is None or (previous is not None and previous._fast is None):
                for event_id, y in items[at:]:  # the reference, one by one
                    self[event_id] = y
                return
            room = current.capacity * 3 // 4
            at, added, shadowed = fast.put_many(
                items, at, None if previous is None else previous._fast,
                current.count, room, self.window or 0,
            )  # fmt: skip
            current.count += added
            self.shadowed += shadowed
            self._rotate_if_due()
            if at < len(items) and current is self.current:
                # Full, or a pair the compiled path leaves to the reference: one by one.
                event_id, y = items[at]
                self[event_id] = y
                at += 1

    def __len__(self) -> int:
        held = self.current.count - self.shadowed
        return held + (self.previous.count if self.previous is not None else 0)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, AppliedIds):
            return NotImplemented
        mine, theirs = self.tables(), other.tables()
        return (
            self.window == other.window
            and self.shadowed == other.shadowed
            and len(mine) == len(theirs)
            and all(
                np.array_equal(a.entries(), b.entries()) for a, b in zip(mine, theirs, strict=True)
            )
        )

    __hash__ = None  # type: ignore[assignment]  # mutable, like the dict it replaces

    def __repr__(self) -> str:
        return f"AppliedIds({len(self)} ids, window={self.window})"

    @property
    def nbytes(self) -> int:
        """Bytes of array memory the index holds."""
        return sum(t.nbytes for t in self.tables())

    def tables(self) -> list[IdTable]:
        """The current table, then the previous one when there is one."""
        return [self.current] if self.previous is None else [self.current, self.previous]

    def state(self) -> dict[str, Any]:
        """The index for a snapshot, in new arrays (a gather: take it off the event loop)."""
        return {
            "format": FORMAT,
            "window": self.window,
            "shadowed": self.shadowed,
            "tables": [t.state() for t in self.tables()],
        }

    @classmethod
    def from_state(
        cls, state: Any, *, window: int | None = None, native: bool = True
    ) -> AppliedIds:
        """The index a snapshot's :meth:`state` saved, kept under ``window``.

        A snapshot taken under another window keeps every id it holds, as the previous
        generation (or the only table when unbounded); the next rotation follows ``window``.
        """
        if not isinstance(state, Mapping) or state.get("format") != FORMAT:
            raise CorruptSnapshot("snapshot holds an applied-id index of an unknown format")
        tables = state.get("tables")
        if not isinstance(tables, list) or len(tables) not in (1, 2):
            raise CorruptSnapshot("snapshot holds an applied-id index without its tables")
        ids = cls(window, native=native)
        loaded = [IdTable.from_state(t, native=native) for t in tables]
        if state.get("window") == window:
            ids.current = loaded[0]
            ids.previous = loaded[1] if len(loaded) == 2 else None
            ids.shadowed = int(state.get("shadowed", 0))
            return ids
        merged = IdTable(capacity_for(sum(t.count for t in loaded)), native=native)
        for table in reversed(loaded):  # the previous table first: current entries win
            table.merged_into(merged)
        ids._keep(merged)
        return ids

    @classmethod
    def from_pairs(
        cls, pairs: Iterable[tuple[str, int]], *, window: int | None = None, native: bool = True
    ) -> AppliedIds:
        """An index of ``(id, class index)`` pairs (an old snapshot's map), kept as `from_state`."""
        whole = cls(None, native=native)
        whole.update(pairs)
        ids = cls(window, native=native)
        ids._keep(whole.current)
        return ids

    @classmethod
    def from_snapshot(
        cls, applied: Any, state_format: int, *, window: int | None = None
    ) -> AppliedIds:
        """The index in a model snapshot of ``state_format`` 2 (arrays) or 1 (an id map)."""
        if state_format == 1:
            if not isinstance(applied, Mapping):
                raise CorruptSnapshot("snapshot holds applied ids that are not a map")
            return cls.from_pairs(((str(k), int(v)) for k, v in applied.items()), window=window)
        return cls.from_state(applied, window=window)

    def _keep(self, table: IdTable) -> None:
        """Hold ``table``'s ids: as the only table unbounded, else as the previous generation."""
        if self.window is None:
            self.current = table
        elif table.count:
            self.previous = table
