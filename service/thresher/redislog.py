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

One Lua script admits a batch atomically (`redisadmit`): a conflict refuses it whole,
duplicates are left out, and every new record takes the next dense offset. Each replica's
follower applies the stream in order, so replicas at one offset hold bit-identical weights.
Restores and rebuilds are control records in the stream (`redisswitch`). The clients, the
model directory and the snapshot store are in `redisstate`.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import AsyncIterator, Callable
from typing import TYPE_CHECKING, Any

import msgpack
from redis.exceptions import RedisError

from .errors import LogUnavailable, Unavailable
from .labellog import LabelLog, OffsetOutOfRange

if TYPE_CHECKING:
    from .models import Model
    from .redisstate import RedisSnapshots, RedisState

READ_BATCH, BLOCK_MS, YIELD_EVERY = 1000, 1000, 256  # records applied as one batch per yield
HEAD_EVERY, INDEX_EVERY = 0.25, 0.5  # seconds between the follower's head and index reads
BACKOFF_MIN, BACKOFF_MAX, RETRY_AFTER = 0.05, 2.0, 2.0
SHARE_TIMEOUT = 1.0
OUTBOX_MAX, RECALL_GRACE = 10_000, 0.02  # queued scored events; second look for a miss
FAILURES = (RedisError, OSError)

SWITCHING = "switching to a restore or rebuild appended on another replica"

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


def _sid(offset: int) -> str:
    """The stream entry id of a log offset (entry ids start at 0-1)."""
    return f"0-{offset + 1}"


def _offset(entry_id: bytes) -> int:
    return int(entry_id.split(b"-", 1)[1]) - 1


def _labels_from(offset: int, entries: list[Any]) -> bool:
    """Whether ``entries`` are exactly the records from ``offset`` on, every one a label.

    Entry ids only rise, so a first and last entry ``len - 1`` apart leave no gap between.
    """
    return (
        bool(entries)
        and _offset(entries[0][0]) == offset
        and _offset(entries[-1][0]) == offset + len(entries) - 1
        and all(b"d" in data for _, data in entries)
    )


def _drop(task: asyncio.Task[Any]) -> None:
    """Cancel a read nobody will use; its failure, if it failed, is of no interest."""
    task.cancel()
    task.add_done_callback(lambda done: done.cancelled() or done.exception())


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
        self.rebuilds = base + "rebuilds"

    def event(self, event_id: str) -> str:
        return f"{self.base}ev:{event_id}"

    def chunk(self, generation: int, i: int) -> str:
        return f"{self.base}snap:{generation}:{i}"


class RedisLog(LabelLog):
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

    # -- the follower -----------------------------------------------------------------------

    def follow(self, current: Callable[[], Model | None], store: RedisSnapshots) -> None:
        """Start applying the stream to ``current()`` from its offset, in order, forever."""
        self._task = asyncio.get_running_loop().create_task(self._follow(current, store))

    async def _follow(self, current: Callable[[], Model | None], store: RedisSnapshots) -> None:
        delay, head_due, index_due = BACKOFF_MIN, 0.0, time.monotonic() + INDEX_EVERY
        # The next read, sent before a batch is applied so Redis works while this replica
        # learns: (its first offset, its task); dropped if the batch moved the model elsewhere.
        ahead: tuple[int, asyncio.Task[Any]] | None = None
        try:
            while not self._closing and (model := current()) is not None and model.log is self:
                try:
                    now = time.monotonic()
                    if now >= head_due:
                        await self._refresh_head(model)
                        head_due = now + HEAD_EVERY
                    if now >= index_due:
                        store.adopt(await self.state.client.hgetall(store.keys.snaps))
                        index_due = now + INDEX_EVERY
                    sent, ahead = ahead, None
                    reply = await self._read(model.offset, sent)
                    self.state.up()
                    if reply and reply[-1][1]:
                        after = _offset(reply[-1][1][-1][0]) + 1
                        ahead = (after, asyncio.ensure_future(self._read(after, None)))
                    for _, entries in reply or []:
                        await self._apply(model, entries, store)
                    if not reply and self._head > model.offset:
                        await self._behind(model, store)
                    delay = BACKOFF_MIN
                except (*FAILURES, Unavailable) as exc:
                    self.state.failed(exc)
                    await asyncio.sleep(delay)
                    delay = min(delay * 2, BACKOFF_MAX)
                except Exception:  # a bad record: stop here, visibly (the lag grows), and retry
                    _log.exception("model %s: cannot apply offset %d", self.name, model.offset)
                    await asyncio.sleep(BACKOFF_MAX)
        finally:
            if ahead is not None:
                _drop(ahead[1])

    async def _read(self, offset: int, sent: tuple[int, asyncio.Task[Any]] | None) -> Any:
        """The XREAD reply from ``offset`` on: the one ``sent`` ahead when it starts there."""
        if sent is not None:
            if sent[0] == offset:
                return await sent[1]
            _drop(sent[1])
        return await self.state.reader.xread(
            {self.keys.stream: _sid(offset - 1)}, count=READ_BATCH, block=BLOCK_MS
        )

    async def catch_up(self, model: Model, store: RedisSnapshots) -> int:
        """Apply the stream from the model's offset to the head as read now; the count."""
        await self.refresh()
        start, end = model.offset, self._head
        if not self._first <= start <= end:
            raise OffsetOutOfRange(f"offset {start} is outside the stream ({self._first}..{end})")
        while model.offset < end:
            before, run = model.offset, []
            async for offset, data in self.entries(model.offset, end):
                run.append((_sid(offset).encode(), data))
                if len(run) == READ_BATCH:
                    break
            await self._apply(model, run, store)
            if model.offset == before:
                raise OffsetOutOfRange(f"offset {before} is no longer in the stream")
        return model.offset - start

    async def _refresh_head(self, model: Model) -> None:
        seq = int(await self.state.client.get(self.keys.seq) or 0)
        if seq < model.offset:
            _log.error(
                "model %s: Redis holds %d records but %d were applied here; was Redis restored "
                "from an older copy? Acknowledged labels may be lost",
                self.name, seq, model.offset,
            )  # fmt: skip
        self._head = seq

    async def _apply(self, model: Model, entries: list[Any], store: RedisSnapshots) -> None:
        """Apply the entries that continue the model's offset, YIELD_EVERY at a time."""
        if all(b"d" in data for _, data in entries):
            await self._apply_labels(model, entries, store)
            return
        # A control record ahead: until it is applied, this replica's applied ids are not the
        # ones the append script now holds, so its labels get 503 rather than an answer from
        # them (a rolled-back id called a duplicate). The requesting replica froze already.
        # The refusal stays while the record cannot be applied.
        switching = model.frozen in (None, SWITCHING)
        if switching:
            model.frozen = SWITCHING
        await self._apply_labels(model, entries, store)
        if switching and model.frozen == SWITCHING:
            model.frozen = None

    async def _apply_labels(self, model: Model, entries: list[Any], store: RedisSnapshots) -> None:
        await model.until_resumed()  # not while a snapshot is taking the weights
        # The usual case, a chunk at a time: the next records, all labels, so no entry by entry
        # checks; whatever else (a gap, a control record, a move while yielding) goes below.
        while _labels_from(model.offset, chunk := entries[:YIELD_EVERY]):
            self._apply_run(model, [data[b"d"] for _, data in chunk])
            entries = entries[YIELD_EVERY:]
            if not entries:
                return
            await asyncio.sleep(0)  # scoring and health checks between chunks of a catch-up
            await model.until_resumed()
        await self._apply_entries(model, entries, store)

    async def _apply_entries(self, model: Model, entries: list[Any], store: RedisSnapshots) -> None:
        """Apply entries one by one from the model's offset: gaps, control records, labels."""
        payloads: list[bytes] = []
        for entry_id, data in entries:
            offset = _offset(entry_id)
            if offset < model.offset + len(payloads):
                continue
            if offset > model.offset + len(payloads):
                self._apply_run(model, payloads)
                await self._resync(model, store, offset)
                return
            if b"d" not in data:  # a restore or rebuild: every replica switches state here
                from . import redisswitch

                self._apply_run(model, payloads)
                payloads = []
                await redisswitch.apply(self, model, offset, data[b"c"], store)
                continue
            payloads.append(data[b"d"])
            if len(payloads) == YIELD_EVERY:
                self._apply_run(model, payloads)
                payloads = []
                await asyncio.sleep(0)  # scoring and health checks between chunks of a catch-up
                await model.until_resumed()
        self._apply_run(model, payloads)

    def _apply_run(self, model: Model, payloads: list[bytes]) -> None:
        try:
            model.apply_payloads(model.offset, payloads)
        finally:
            self._head = max(self._head, model.offset)
            if payloads:
                self.progressed = time.monotonic()

    async def _behind(self, model: Model, store: RedisSnapshots) -> None:
        """Nothing to read, yet records to apply: they were trimmed, and none came after."""
        await self.refresh()
        if self._first > model.offset:
            await self._resync(model, store, self._first)

    async def _resync(self, model: Model, store: RedisSnapshots, found: int) -> None:
        """The stream was trimmed past this replica: jump to the snapshot furthest along."""
        loaded = await asyncio.to_thread(store.load_furthest, found)
        if loaded is None:
            _log.error("model %s: stream starts at %d, past offset %d, and no snapshot covers "
                       "the gap; waiting for one", self.name, found, model.offset)  # fmt: skip
            await asyncio.sleep(BACKOFF_MAX)
            return
        await model.until_resumed()  # not while a snapshot is taking the weights
        skipped = model.offset
        model.load_state(loaded[0])
        model.skip_to(model.offset)  # wakes what waits for the offsets it jumped over
        self.saw(model.offset)
        self.progress()
        self.resyncs += 1
        _log.warning("model %s: lagged past the trimmed stream at offset %d; loaded the snapshot "
                     "at offset %d", self.name, skipped, model.offset)  # fmt: skip
