"""The Redis Streams backend of the label log: one stream per model, and its follower.

Keys; ``{name}`` is a hash tag, so one model lives in one Redis Cluster slot, and ``T`` is the
model's incarnation token, so a model deleted and created again never meets its old keys::

    thresher:models             hash    name -> {"config", "token"} (JSON), every model
    thresher:{name}:live        string  the current token; the append script checks it
    thresher:{name}:T:seq       counter records appended so far: the head offset
    thresher:{name}:T:stream    stream  entry ``0-n`` holds offset n-1 in field ``d``
    thresher:{name}:T:ids       hash    id key -> label: exactly-once admission; the key is
                                        the id's 16-byte hash (`appliedids.id_key`)
    thresher:{name}:T:ids:prev  hash    the previous generation under --applied-window
    thresher:{name}:T:applied   hash    raw event id -> label, as written before the ids
                                        were hashed: read only, dropped by the next switch
    thresher:{name}:T:excluded  set     sources whose labels are appended but never applied
    thresher:{name}:T:freeze    string  set while a restore or rebuild is being appended
    thresher:{name}:T:ev:ID     string  msgpack [fields, served label, time], with a TTL
    thresher:{name}:T:snaps     hash    generation -> msgpack {offset, time, bytes, chunks}
    thresher:{name}:T:snap:G:I  string  chunk I of snapshot generation G
    thresher:{name}:T:snapgen, :snaplock  generation counter; writer lock (SET NX PX)
    thresher:{name}:T:ids:next, :ids:next:prev  the id hashes a restore or rebuild leaves
    thresher:{name}:T:rebuilds  hash    offset of a rebuild record no snapshot is past yet ->
                                        "START GENERATION": what it reads (kept from trimming)
    thresher:{name}:T:switched  string  the offset of the last restore or rebuild record

One Lua script admits a batch atomically (`redisadmit`): a conflict refuses it whole,
duplicates are left out, and every new record takes the next dense offset. Each replica's
follower applies the stream in order, so replicas at one offset hold bit-identical weights.
Restores and rebuilds are control records in the stream (`redisswitch`). The follower is in
`redisfollow`; the clients, the model directory and the snapshot store are in `redisstate`.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import AsyncIterator
from typing import TYPE_CHECKING, Any

import msgpack

from .errors import LogUnavailable
from .labellog import LabelLog, OffsetOutOfRange
from .redisfollow import BLOCK_MS, FAILURES, Following, _offset, _sid

if TYPE_CHECKING:
    from .redisstate import RedisState

RETRY_AFTER, SHARE_TIMEOUT = 2.0, 1.0
OUTBOX_MAX, RECALL_GRACE = 10_000, 0.02  # queued scored events; second look for a miss

_log = logging.getLogger("thresher.redis")

# KEYS: stream, snapshot index, pending rebuilds. ARGV: the offset to trim below. Rebuild
# records that a snapshot is past are no longer pending; those that are pending keep the
# records they relearn, from their start. Answers the offset it trimmed below (0: none).
TRIM = """
local below = tonumber(ARGV[1])
local covered = -1
local index = redis.call('HGETALL', KEYS[2])
for i = 2, #index, 2 do
  local ok, meta = pcall(cmsgpack.unpack, index[i])
  if ok and type(meta) == 'table' and tonumber(meta['offset']) then
    covered = math.max(covered, tonumber(meta['offset']))
  end
end
local pending = redis.call('HGETALL', KEYS[3])
for i = 1, #pending, 2 do
  if tonumber(pending[i]) < covered then
    redis.call('HDEL', KEYS[3], pending[i])
  else
    below = math.min(below, tonumber(string.match(pending[i + 1], '^(%d+)')))
  end
end
if below > 0 then redis.call('XTRIM', KEYS[1], 'MINID', '0-' .. (below + 1)) end
return below
"""


def unavailable(exc: BaseException, what: str) -> LogUnavailable:
    return LogUnavailable(f"Redis is unreachable ({exc}); {what}", retry_after=RETRY_AFTER)


class Keys:
    """The key names of one incarnation of one model."""

    def __init__(self, name: str, token: str) -> None:
        self.live = f"thresher:{{{name}}}:live"
        base = f"thresher:{{{name}}}:{token}:"
        self.base = base
        self.seq, self.stream = base + "seq", base + "stream"
        self.ids, self.previous, self.legacy = base + "ids", base + "ids:prev", base + "applied"
        self.snaps, self.snapgen, self.lock = base + "snaps", base + "snapgen", base + "snaplock"
        self.freeze, self.excluded = base + "freeze", base + "excluded"
        self.staged, self.staged_previous = base + "ids:next", base + "ids:next:prev"
        self.rebuilds, self.switched = base + "rebuilds", base + "switched"

    def event(self, event_id: str) -> str:
        return f"{self.base}ev:{event_id}"

    def chunk(self, generation: int, i: int) -> str:
        return f"{self.base}snap:{generation}:{i}"


class RedisLog(Following, LabelLog):
    """One model's label log as a Redis Stream, with its follower and shared event cache."""

    def __init__(self, state: RedisState, name: str, token: str) -> None:
        self.state, self.name, self.token = state, name, token
        self.keys = Keys(name, token)
        self._head = self._first = 0
        self._task: asyncio.Task[None] | None = None
        self._closing = False
        self._outbox: list[tuple[str, bytes]] = []
        self._wake = asyncio.Event()
        self._writer: asyncio.Task[None] | None = None
        self.events_dropped = 0  # scored events not shared: queue full or Redis down
        self.resyncs = 0  # snapshots loaded in place of stream records no longer there
        self.progressed = time.monotonic()  # when the follower last moved (`progress`)

    async def refresh(self) -> None:
        """Read the head and the first retained offset."""
        try:
            seq = await self.state.client.get(self.keys.seq)
            oldest = await self.state.client.xrange(self.keys.stream, count=1)
        except FAILURES as exc:
            self.state.failed(exc)
            raise unavailable(exc, "cannot read the label stream") from exc
        self._head = int(seq or 0)
        self._first = _offset(oldest[0][0]) if oldest else self._head

    # -- the LabelLog interface ---------------------------------------------------------------

    def head(self) -> int:
        """The last stream length seen (by appends, the follower or reads)."""
        return self._head

    def first(self) -> int:
        return self._first

    def saw(self, head: int) -> None:
        """Note that the stream holds at least ``head`` records."""
        self._head = max(self._head, head)

    def progress(self) -> None:
        """Note that the follower moved: applied records, or relearnt some for a rebuild."""
        self.progressed = time.monotonic()

    async def append(self, payloads: list[bytes]) -> int:
        """Append records that need no exactly-once check; returns the first offset."""
        first, _, _ = await self.admit(payloads, [(None, "", "")] * len(payloads))
        return first

    async def read(self, start: int) -> AsyncIterator[tuple[int, bytes]]:
        """Yield every record from ``start`` to the head as it was when reading began."""
        await self.refresh()
        end = self._head
        if not self._first <= start <= end:
            raise OffsetOutOfRange(f"offset {start} is outside the stream ({self._first}..{end})")
        async for cursor, data in self.entries(start, end):
            if b"d" not in data:
                raise RuntimeError(
                    f"offset {cursor} of model {self.name!r} is a restore or rebuild, not a "
                    "label; apply the stream with catch_up"
                )
            yield cursor, data[b"d"]

    async def entries(self, start: int, end: int) -> AsyncIterator[tuple[int, Any]]:
        """The raw stream entries (offset, fields) from ``start`` to ``end`` (exclusive)."""
        cursor = start
        async for page in self.pages(start, end):
            for _, data in page:
                yield cursor, data
                cursor += 1

    async def pages(self, start: int, end: int, count: int = 2000) -> AsyncIterator[list[Any]]:
        """The raw stream entries from ``start`` to ``end`` (exclusive), as XRANGE pages of
        (entry id, fields); OffsetOutOfRange at the first offset no longer in the stream."""
        cursor = start
        while cursor < end:
            try:
                page = await self.state.client.xrange(
                    self.keys.stream, min=_sid(cursor), max=_sid(end - 1), count=count
                )
            except FAILURES as exc:
                self.state.failed(exc)
                raise unavailable(exc, "the stream could not be read") from exc
            # Entry ids only rise: a page whose ends are len - 1 apart holds no gap.
            if not page or _offset(page[0][0]) != cursor:
                raise OffsetOutOfRange(f"offset {cursor} is no longer in the stream")
            if _offset(page[-1][0]) != cursor + len(page) - 1:
                raise OffsetOutOfRange(f"the stream has a gap after offset {cursor}")
            yield page
            cursor += len(page)

    async def trim(self, below: int) -> None:
        """Drop entries below ``below`` (XTRIM MINID), but none a pending rebuild reads."""
        if below <= self._first:
            return
        keys = [self.keys.stream, self.keys.snaps, self.keys.rebuilds]
        try:
            kept = int(await self.state.client.eval(TRIM, len(keys), *keys, below))
        except FAILURES as exc:
            self.state.failed(exc)
            return  # a later snapshot trims again
        if kept < below:
            _log.info(
                "model %s: stream kept from offset %d, not %d, for a rebuild not yet in a "
                "snapshot", self.name, kept, below,
            )  # fmt: skip
        self._first = max(self._first, kept)

    async def close(self) -> None:
        """Stop the follower; the clients belong to the RedisState."""
        self._closing = True
        if self._writer is not None:
            self._writer.cancel()
            await asyncio.wait({self._writer}, timeout=SHARE_TIMEOUT)
        if self._task is not None:
            # A cancel landing inside the client's read can come back as a ConnectionError;
            # the flag ends the loop then, and the wait is bounded either way.
            self._task.cancel()
            await asyncio.wait({self._task}, timeout=BLOCK_MS / 1000)
            self._task = None

    # -- shared by every replica ------------------------------------------------------------

    async def admit(
        self, payloads: list[bytes], keys: list[tuple[str | None, str, str]]
    ) -> tuple[int, list[int], tuple[int, str] | None]:
        """Append what is new, atomically: (first offset, duplicate positions, conflict);
        ``keys`` holds each record's (id, label, source)."""
        # The script's module imports this one, as redisswitch does.
        from .redisadmit import admit

        return await admit(self, payloads, keys)

    async def share(self, scored: list[tuple[str, Any, str]], now: float) -> None:
        """Queue scored events (id, fields, served label) for other replicas; never waits."""
        # Awaiting the write would add a Redis round trip and an AOF fsync to every score.
        if time.monotonic() < self.state.down_until or len(self._outbox) >= OUTBOX_MAX:
            self.events_dropped += len(scored)
            return
        for event_id, fields, served in scored:
            try:
                value = msgpack.packb([fields, served, now], use_bin_type=True)
            except (TypeError, ValueError):  # fields msgpack cannot hold: stay local
                self.events_dropped += 1
                continue
            self._outbox.append((self.keys.event(event_id), value))
        if self._writer is None:
            self._writer = asyncio.get_running_loop().create_task(self._write_events())
        self._wake.set()

    async def _write_events(self) -> None:
        """Send every queued scored event in one pipeline per wake-up."""
        while not self._closing:
            await self._wake.wait()
            self._wake.clear()
            batch, self._outbox = self._outbox, []
            try:
                async with self.state.client.pipeline(transaction=False) as pipe:
                    for key, value in batch:
                        pipe.set(key, value, ex=self.state.event_ttl)
                    await asyncio.wait_for(pipe.execute(), SHARE_TIMEOUT)
            except (*FAILURES, TimeoutError) as exc:
                self.events_dropped += len(batch)
                self.state.failed(exc)

    async def recall(self, ids: list[str]) -> dict[str, tuple[Any, str, float]]:
        """Events scored on any replica, by id: (fields, served label, time)."""
        found = await self._recall(ids)
        missing = [i for i in ids if i not in found]
        if missing:  # another replica's writer may be a moment behind its score answer
            await asyncio.sleep(RECALL_GRACE)
            found.update(await self._recall(missing))
        return found

    async def _recall(self, ids: list[str]) -> dict[str, tuple[Any, str, float]]:
        try:
            values = await self.state.client.mget([self.keys.event(i) for i in ids])
        except FAILURES as exc:
            self.state.failed(exc)
            raise unavailable(exc, "nothing was acknowledged") from exc
        found = {}
        for event_id, raw in zip(ids, values, strict=True):
            try:
                fields, served, at = msgpack.unpackb(raw, raw=False) if raw else (None, 0, 0)
            except (ValueError, TypeError, msgpack.UnpackException):
                continue
            if isinstance(fields, dict) and isinstance(served, str):
                found[event_id] = (fields, served, float(at))
        return found
