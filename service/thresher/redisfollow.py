"""The follower of a model's Redis stream: it applies the stream in order, forever.

`Following` is the part of :class:`~thresher.redislog.RedisLog` that reads the stream from the
model's offset (one blocking XREAD in flight, the next sent while a batch is applied), applies
label runs as batches, hands control records to `redisswitch`, and, when records it needs
were trimmed away, loads the snapshot furthest along. Its state is set up by
``RedisLog.__init__``.
"""

from __future__ import annotations

import asyncio
import logging
import time
from collections.abc import AsyncIterator, Callable
from typing import TYPE_CHECKING, Any

from redis.exceptions import RedisError

from .errors import Unavailable
from .labellog import OffsetOutOfRange

if TYPE_CHECKING:
    from .models import Model
    from .redisstate import RedisSnapshots, RedisState

READ_BATCH, BLOCK_MS, YIELD_EVERY = 1000, 1000, 256  # records applied as one batch per yield
HEAD_EVERY, INDEX_EVERY = 0.25, 0.5  # seconds between the follower's head and index reads
BACKOFF_MIN, BACKOFF_MAX = 0.05, 2.0
FAILURES = (RedisError, OSError)

SWITCHING = "switching to a restore or rebuild appended on another replica"

_log = logging.getLogger("thresher.redis")


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


class Following:
    """The follower of `RedisLog`, which owns the state used here."""

    state: RedisState
    name: str
    _head: int
    _first: int
    _task: asyncio.Task[None] | None
    _closing: bool
    resyncs: int
    progressed: float
    keys: Any  # redislog.Keys
    refresh: Callable[[], Any]
    entries: Callable[[int, int], AsyncIterator[tuple[int, Any]]]
    saw: Callable[[int], None]
    progress: Callable[[], None]

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
        """Read the head, and the offset of the last control record: a replica behind one
        refuses labels until it has applied it (see `_apply`), however far behind it is."""
        raw, switched = await self.state.client.mget(self.keys.seq, self.keys.switched)
        seq, switch = int(raw or 0), -1 if switched is None else int(switched)
        if switch >= model.offset and model.frozen is None:
            model.frozen = SWITCHING
        elif switch < model.offset and model.frozen == SWITCHING:
            model.frozen = None  # applied, or jumped past with a snapshot
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
