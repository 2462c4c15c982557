"""The label log: the :class:`LabelLog` interface and :class:`FileLog`, its segment-file backend.

The segment file format and open-time recovery live in :mod:`thresher.segments` (its names are
re-exported here); this module appends, syncs, reads and trims.

Flush ``always`` acknowledges an append once an fsync covers it; appends that arrive while an
fsync is in flight share the next one (group commit). Flush ``interval`` acknowledges after the
write and fsyncs every ``interval_ms``: a power loss can lose the records of that window.
An append cancelled while it waits for its fsync has still been written and keeps its offset.
"""

from __future__ import annotations

import abc
import asyncio
import bisect
import contextlib
import errno
import fcntl
import logging
import os
from collections import deque
from collections.abc import AsyncIterator
from itertools import islice
from pathlib import Path
from typing import Any

from .errors import LogUnavailable
from .segments import (
    FRAME,
    HEADER,
    MAGIC,
    MAX_RECORD_BYTES,
    READ_CHUNK,
    SPARSE_EVERY,
    SUFFIX,
    VERSION,
    CorruptLog,
    OffsetOutOfRange,
    create_segment,
    frame_records,
    fsync_dir,
    read_segment,
    recover,
    segment_path,
)

__all__ = [
    "FRAME",
    "HEADER",
    "MAGIC",
    "MAX_RECORD_BYTES",
    "READ_CHUNK",
    "SPARSE_EVERY",
    "SUFFIX",
    "VERSION",
    "CorruptLog",
    "FileLog",
    "LabelLog",
    "OffsetOutOfRange",
]

READ_BATCH = 1000  # payloads per list of the default `read_batches`

_log = logging.getLogger("thresher.log")


class LabelLog(abc.ABC):
    """An ordered, durable sequence of label payloads with dense offsets from 0."""

    @abc.abstractmethod
    async def append(self, payloads: list[bytes]) -> int:
        """Append records; return the offset of the first once they are durable."""

    @abc.abstractmethod
    def read(self, start: int) -> AsyncIterator[tuple[int, bytes]]:
        """Yield ``(offset, payload)`` from ``start`` up to the head as iteration begins."""

    async def read_batches(self, start: int) -> AsyncIterator[list[bytes]]:
        """The payloads `read` yields, a list at a time: for readers that apply them in runs."""
        batch: list[bytes] = []
        async for _, payload in self.read(start):
            batch.append(payload)
            if len(batch) == READ_BATCH:
                yield batch
                batch = []
        if batch:
            yield batch

    @abc.abstractmethod
    def head(self) -> int:
        """The offset the next acknowledged record will get."""

    @abc.abstractmethod
    def first(self) -> int:
        """The lowest offset still retained."""

    @abc.abstractmethod
    async def trim(self, below: int) -> None:
        """Drop stored records below ``below`` where the backend's granularity allows."""

    @abc.abstractmethod
    async def close(self) -> None:
        """Make everything durable and release the log."""


class FileLog(LabelLog):
    """Append-only segment files in one directory, in the format of :mod:`thresher.segments`."""

    def __init__(
        self,
        directory: str | os.PathLike[str],
        *,
        flush: str = "always",
        interval_ms: int = 50,
        segment_bytes: int = 64 * 1024 * 1024,
    ) -> None:
        """Open (creating or recovering) the log; blocking, so prefer ``await FileLog.open``."""
        if flush not in ("always", "interval"):
            raise ValueError(f"flush must be 'always' or 'interval', not {flush!r}")
        if interval_ms <= 0 or segment_bytes <= 0:
            raise ValueError("interval_ms and segment_bytes must be greater than 0")
        self.directory = Path(directory)
        self.flush, self.interval_ms, self.segment_bytes = flush, interval_ms, segment_bytes
        self.fsyncs = self.bytes_written = self.records_written = self.appends = 0
        self.write_errors = self.sync_errors = self.rotations = 0
        self.directory.mkdir(parents=True, exist_ok=True)
        self._lock_fd = os.open(self.directory / "LOCK", os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(self._lock_fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            os.close(self._lock_fd)
            raise LogUnavailable(f"label log {self.directory} is open elsewhere ({exc})") from exc
        self._index: dict[int, list[int]] = {}
        self._waiters: deque[tuple[int, asyncio.Future[None]]] = deque()
        self._sync_task: asyncio.Task[None] | None = None
        self._timer: asyncio.Task[None] | None = None
        self._write_lock = asyncio.Lock()
        self._sync_error: OSError | None = None
        self._needs_repair = self._closed = False
        try:
            found = recover(self.directory, self._index)
        except BaseException:
            os.close(self._lock_fd)
            raise
        self._bases, self._written, self._pos = found.bases, found.written, found.pos
        self.recovered_bytes_dropped = found.dropped
        self.recovered_at: int | None = found.at  # offset where a torn tail was cut, if one was
        # Start-up replays the last segment right after recovery read and checked all of it:
        # the first read takes those payloads instead of reading and checking them again.
        self._recovered: tuple[int, list[bytes]] | None = (found.bases[-1], found.tail)
        base = self._bases[-1]
        self._fd = os.open(self._path(base), os.O_WRONLY | os.O_APPEND)
        self._durable = self._written
        self._durable_pos = self._pos

    @classmethod
    async def open(cls, directory: str | os.PathLike[str], **options: Any) -> FileLog:
        """Open the log in a worker thread, so recovery does not block the event loop."""
        return await asyncio.to_thread(cls, directory, **options)

    def _path(self, base: int) -> Path:
        return segment_path(self.directory, base)

    # -- appending --------------------------------------------------------------------------

    def head(self) -> int:
        """Next offset; under ``always`` only fsynced records count as appended."""
        return self._written if self.flush == "interval" else self._durable

    def first(self) -> int:
        return self._bases[0]

    @property
    def durable_head(self) -> int:
        """The offset below which every record is known to be on stable storage."""
        return self._durable

    @property
    def segments(self) -> int:
        return len(self._bases)

    async def append(self, payloads: list[bytes]) -> int:
        """Write the records in one write, in call order; see the module docstring for when."""
        buf = frame_records(payloads)
        async with self._write_lock:  # FIFO, and free of awaits unless a segment rotates
            if self._closed:
                raise LogUnavailable("label log is closed; nothing was acknowledged")
            if self._needs_repair:
                self._truncate(self._pos)
            if self._sync_error is not None:
                raise self._unavailable(self._sync_error)
            if self._pos + len(buf) > self.segment_bytes and self._written > self._bases[-1]:
                await self._rotate()
            first = self._written
            self._recovered = None  # only the first read, before anything changes, uses it
            self._write(buf)
            self._note_positions(first, payloads)
            self._written += len(payloads)
            self._pos += len(buf)
            self.appends += 1
            self.records_written += len(payloads)
            self.bytes_written += len(buf)
            if self.flush == "interval":
                if self._timer is None:
                    self._timer = asyncio.get_running_loop().create_task(self._tick())
                return first
            done = asyncio.get_running_loop().create_future()
            self._waiters.append((self._written, done))
            self._kick()
        await done
        return first

    def _write(self, buf: bytes) -> None:
        view, done = memoryview(buf), 0
        try:
            while done < len(view):
                wrote = os.write(self._fd, view[done:])
                if wrote <= 0:
                    raise OSError(errno.EIO, "write made no progress")
                done += wrote
        except OSError as exc:
            self.write_errors += 1
            self._truncate(self._pos)  # a partial record must not stay in the file
            raise self._unavailable(exc) from exc

    def _truncate(self, position: int) -> None:
        try:
            os.ftruncate(self._fd, position)
        except OSError as exc:
            self._needs_repair = True
            raise self._unavailable(exc) from exc
        self._needs_repair = False

    def _note_positions(self, first: int, payloads: list[bytes]) -> None:
        """Extend the sparse index with the file positions of the records appended that the
        index wants (each SPARSE_EVERY-th of the segment); most appends hold none of them."""
        base = self._bases[-1]
        index = self._index.setdefault(base, [HEADER.size])
        mark = len(index) * SPARSE_EVERY - (first - base)  # the position in ``payloads``
        if mark < 0:
            return
        pos, at = self._pos, 0
        while mark < len(payloads):
            pos += FRAME.size * (mark - at) + sum(map(len, islice(payloads, at, mark)))
            index.append(pos)
            at, mark = mark, mark + SPARSE_EVERY

    def _unavailable(self, exc: OSError) -> LogUnavailable:
        name = errno.errorcode.get(exc.errno or 0, "error")
        reason = os.strerror(exc.errno) if exc.errno else str(exc)
        return LogUnavailable(
            f"label log cannot write: {reason} ({name} on segment "
            f"{self._path(self._bases[-1]).name}); nothing from this request was acknowledged"
        )

    # -- durability -------------------------------------------------------------------------

    def _kick(self) -> None:
        if self._sync_task is None or self._sync_task.done():
            self._sync_task = asyncio.get_running_loop().create_task(self._sync_loop())

    async def _sync_loop(self) -> None:
        """fsync until everything written is durable; each round covers all writes so far."""
        loop = asyncio.get_running_loop()
        while self._durable < self._written:
            target, target_pos = self._written, self._pos
            try:
                await loop.run_in_executor(None, os.fsync, self._fd)
            except OSError as exc:
                self._sync_failed(exc)
                return
            self.fsyncs += 1
            self._sync_error = None
            self._durable, self._durable_pos = target, target_pos
            while self._waiters and self._waiters[0][0] <= target:
                _, done = self._waiters.popleft()
                if not done.done():
                    done.set_result(None)

    def _sync_failed(self, exc: OSError) -> None:
        self.sync_errors += 1
        _log.error("label log %s: fsync failed: %s", self.directory, exc)
        if self.flush == "always":
            # Nothing past the last good fsync was acknowledged: cut it so offsets are reused
            # by the next appends and the file holds only what callers were told is durable.
            self._written, self._pos = self._durable, self._durable_pos
            base = self._bases[-1]
            keep = (self._written - base + SPARSE_EVERY - 1) // SPARSE_EVERY
            del self._index[base][max(keep, 1) :]
            with contextlib.suppress(LogUnavailable):  # retried before the next write
                self._truncate(self._pos)
        else:
            self._sync_error = exc  # acknowledged already; refuse new appends until a sync works
        while self._waiters:
            _, done = self._waiters.popleft()
            if not done.done():
                done.set_exception(self._unavailable(exc))

    async def _flush(self) -> None:
        """Wait until everything written so far is durable."""
        if self._durable >= self._written:
            return
        done = asyncio.get_running_loop().create_future()
        self._waiters.append((self._written, done))
        self._kick()
        await done

    async def _tick(self) -> None:
        while not self._closed:
            await asyncio.sleep(self.interval_ms / 1000)
            if self._durable < self._written:
                self._kick()

    async def _rotate(self) -> None:
        await self._flush()  # the old segment is complete and durable before a new one starts
        base = self._written
        try:
            fd = await asyncio.to_thread(create_segment, self.directory, base, self._index)
        except OSError as exc:
            raise self._unavailable(exc) from exc
        old, self._fd = self._fd, fd
        self._bases.append(base)
        self._pos = self._durable_pos = HEADER.size
        self.rotations += 1
        os.close(old)

    # -- reading, trimming, closing ---------------------------------------------------------

    async def read(self, start: int) -> AsyncIterator[tuple[int, bytes]]:
        """Yield every record from ``start`` to the head as it was when reading began."""
        offset = start
        async for batch in self.read_batches(start):
            for payload in batch:
                yield offset, payload
                offset += 1

    async def read_batches(self, start: int) -> AsyncIterator[list[bytes]]:
        """The records of `read`, as the lists each read of a segment file parses."""
        end = self.head()
        if not self.first() <= start <= end:
            raise OffsetOutOfRange(
                f"offset {start} is outside the label log, which holds {self.first()}..{end}"
            )
        offset, recovered, self._recovered = start, self._recovered, None
        while offset < end:
            i = bisect.bisect_right(self._bases, offset) - 1
            if i < 0:
                raise OffsetOutOfRange(f"offset {offset} was trimmed while it was being read")
            base = self._bases[i]
            stop = min(end, self._bases[i + 1]) if i + 1 < len(self._bases) else end
            if recovered is not None and recovered[0] == base:
                held = recovered[1][offset - base : stop - base]
                for k in range(0, len(held), READ_BATCH):
                    yield held[k : k + READ_BATCH]
                offset += len(held)
                recovered = None
                if offset == stop:
                    continue
            index = self._index.setdefault(base, [HEADER.size])
            async for batch in read_segment(self._path(base), base, index, offset, stop):
                yield batch
                offset += len(batch)

    async def trim(self, below: int) -> None:
        """Delete whole segments whose records are all below ``below``; never the active one."""
        self._recovered = None
        doomed: list[int] = []
        while len(self._bases) > 1 and self._bases[1] <= below:
            doomed.append(self._bases.pop(0))
            self._index.pop(doomed[-1], None)
        if doomed:
            await asyncio.to_thread(self._unlink, doomed)

    def _unlink(self, bases: list[int]) -> None:
        for base in bases:
            self._path(base).unlink(missing_ok=True)
        fsync_dir(self.directory)

    async def close(self) -> None:
        """Flush, stop the background fsync, and release the files; safe to call twice."""
        if self._closed:
            return
        try:
            async with self._write_lock:
                self._closed = True
                if self._sync_error is None and not self._needs_repair:
                    await self._flush()
        finally:
            self._closed = True
            if self._timer is not None:
                self._timer.cancel()
                await asyncio.gather(self._timer, return_exceptions=True)
            if self._sync_task is not None:
                await asyncio.gather(self._sync_task, return_exceptions=True)
            os.close(self._fd)
            os.close(self._lock_fd)
