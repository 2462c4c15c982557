"""The label log: the :class:`LabelLog` interface and :class:`FileLog`, its segment-file backend.

A segment file holds a 20-byte header (magic ``THRLSEG\\0``, u16 format version, u16 zero,
u64 first offset) and then records, each a little-endian u32 payload length, the u32 CRC-32
of the payload, and the payload. Files are named by their first offset, so the offsets of a
closed segment are known without reading it and only the last segment is scanned on open.

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
import struct
import zlib
from collections import deque
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

from .errors import LogUnavailable

MAGIC = b"THRLSEG\0"
VERSION = 1
HEADER = struct.Struct("<8sHHQ")
FRAME = struct.Struct("<II")
SUFFIX = ".seg"
MAX_RECORD_BYTES = 16 * 1024 * 1024
SPARSE_EVERY = 256  # one remembered file position per this many records of a segment
READ_CHUNK = 1 << 20

_log = logging.getLogger("thresher.log")


class CorruptLog(Exception):
    """A segment fails its checks where records were acknowledged; nothing is dropped."""

    def __init__(self, path: Path, position: int, reason: str) -> None:
        super().__init__(
            f"label log segment {path} is corrupt at byte {position}: {reason}; acknowledged "
            "records would be lost by skipping it, so restore the file or rebuild the model"
        )
        self.path, self.position, self.reason = path, position, reason


class OffsetOutOfRange(LookupError):
    """A read started below the first retained offset or above the head."""


class LabelLog(abc.ABC):
    """An ordered, durable sequence of label payloads with dense offsets from 0."""

    @abc.abstractmethod
    async def append(self, payloads: list[bytes]) -> int:
        """Append records; return the offset of the first once they are durable."""

    @abc.abstractmethod
    def read(self, start: int) -> AsyncIterator[tuple[int, bytes]]:
        """Yield ``(offset, payload)`` from ``start`` up to the head as iteration begins."""

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


def _parse(
    buf: bytes, pos: int, count: int, rel: int, index: list[int], at: int
) -> tuple[list[bytes], int, str | None]:
    """Parse up to ``count`` records; return them, the end position, and why parsing stopped.

    ``rel`` is the first record's number within its segment and ``at`` the file position of
    ``buf[0]``, so that sparse-index positions can be recorded as the scan passes them.
    A ``None`` reason with fewer than ``count`` records means the buffer ran out.
    """
    out: list[bytes] = []
    size = len(buf)
    while len(out) < count:
        if pos + 8 > size:
            return out, pos, None
        length, crc = FRAME.unpack_from(buf, pos)
        if length == 0 or length > MAX_RECORD_BYTES:
            return out, pos, f"impossible record length {length}"
        stop = pos + 8 + length
        if stop > size:
            return out, pos, None
        payload = buf[pos + 8 : stop]
        if zlib.crc32(payload) != crc:
            return out, pos, "CRC-32 mismatch"
        number = rel + len(out)
        if number == len(index) * SPARSE_EVERY:
            index.append(at + pos)
        out.append(payload)
        pos = stop
    return out, pos, None


def _fsync_dir(directory: Path) -> None:
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class FileLog(LabelLog):
    """Append-only segment files in one directory; see the module docstring for the format."""

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
        self.recovered_bytes_dropped = 0
        self.recovered_at: int | None = None  # offset where a torn tail was cut, if one was
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
            self._bases = self._recover()
        except BaseException:
            os.close(self._lock_fd)
            raise
        base = self._bases[-1]
        self._fd = os.open(self._path(base), os.O_WRONLY | os.O_APPEND)
        self._durable = self._written
        self._durable_pos = self._pos

    @classmethod
    async def open(cls, directory: str | os.PathLike[str], **options: Any) -> FileLog:
        """Open the log in a worker thread, so recovery does not block the event loop."""
        return await asyncio.to_thread(cls, directory, **options)

    # -- recovery ---------------------------------------------------------------------------

    def _path(self, base: int) -> Path:
        return self.directory / f"{base:020d}{SUFFIX}"

    def _recover(self) -> list[int]:
        names = sorted(p.name for p in self.directory.glob("*" + SUFFIX))
        bases = [int(n[:20]) for n in names if len(n) == 20 + len(SUFFIX) and n[:20].isdigit()]
        if not bases:
            os.close(self._create_segment(0))
            bases = [0]
        for base in bases[:-1]:
            with open(self._path(base), "rb") as handle:
                self._check_header(base, handle.read(HEADER.size))
        base = bases[-1]
        path = self._path(base)
        data = path.read_bytes()
        if len(data) < HEADER.size:  # a crash while the segment was being created
            self._cut(path, base, 0, len(data), "segment header torn")
            path.unlink()
            os.close(self._create_segment(base))
            data = path.read_bytes()
        self._check_header(base, data[: HEADER.size])
        index = self._index.setdefault(base, [])
        found, end, reason = _parse(data, HEADER.size, len(data), 0, index, 0)
        self._written, self._pos = base + len(found), end
        if end < len(data):
            self._cut(path, self._written, end, len(data) - end, reason or "torn record")
            with open(path, "r+b") as handle:
                handle.truncate(end)
                os.fsync(handle.fileno())
        return bases

    def _check_header(self, base: int, header: bytes) -> None:
        path = self._path(base)
        if len(header) < HEADER.size:
            raise CorruptLog(path, len(header), "segment header is short")
        magic, version, _, first = HEADER.unpack(header)
        if magic != MAGIC:
            raise CorruptLog(path, 0, "not a thresher label log segment (bad magic)")
        if version != VERSION:
            raise CorruptLog(path, 8, f"segment format version {version}, this build reads 1")
        if first != base:
            raise CorruptLog(path, 12, f"header says first offset {first}, the name says {base}")

    def _cut(self, path: Path, offset: int, position: int, dropped: int, reason: str) -> None:
        self.recovered_bytes_dropped += dropped
        self.recovered_at = offset
        _log.warning(
            "label log %s: dropped %d bytes of a torn or corrupt tail at offset %d "
            "(byte %d of %s): %s",
            self.directory, dropped, offset, position, path.name, reason,
        )  # fmt: skip

    def _create_segment(self, base: int) -> int:
        """Create a segment holding only its header, durable with its directory entry."""
        path = self._path(base)
        fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_APPEND, 0o644)
        try:
            os.write(fd, HEADER.pack(MAGIC, VERSION, 0, base))
            os.fsync(fd)
            _fsync_dir(self.directory)
        except BaseException:
            os.close(fd)
            path.unlink(missing_ok=True)
            raise
        self._index[base] = [HEADER.size]
        return fd

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
        if not payloads:
            raise ValueError("append needs at least one payload")
        parts: list[bytes] = []
        for payload in payloads:
            if not isinstance(payload, bytes) or not 0 < len(payload) <= MAX_RECORD_BYTES:
                raise ValueError(f"a payload must be 1..{MAX_RECORD_BYTES} bytes")
            parts += (FRAME.pack(len(payload), zlib.crc32(payload)), payload)
        buf = b"".join(parts)
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
        base = self._bases[-1]
        index = self._index.setdefault(base, [HEADER.size])
        pos = self._pos
        for k, payload in enumerate(payloads):
            number = first - base + k
            if number == len(index) * SPARSE_EVERY:
                index.append(pos)
            pos += FRAME.size + len(payload)

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
            fd = await asyncio.to_thread(self._create_segment, base)
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
        end = self.head()
        if not self.first() <= start <= end:
            raise OffsetOutOfRange(
                f"offset {start} is outside the label log, which holds {self.first()}..{end}"
            )
        offset = start
        while offset < end:
            i = bisect.bisect_right(self._bases, offset) - 1
            if i < 0:
                raise OffsetOutOfRange(f"offset {offset} was trimmed while it was being read")
            base = self._bases[i]
            stop = min(end, self._bases[i + 1]) if i + 1 < len(self._bases) else end
            async for batch in self._segment(base, offset, stop):
                for payload in batch:
                    yield offset, payload
                    offset += 1

    async def _segment(self, base: int, start: int, stop: int) -> AsyncIterator[list[bytes]]:
        """Batches of the records ``start..stop`` of one segment, every CRC checked."""
        path = self._path(base)
        index = self._index.setdefault(base, [HEADER.size])
        k = min((start - base) // SPARSE_EVERY, len(index) - 1)
        at, number = index[k], k * SPARSE_EVERY
        try:
            handle = open(path, "rb")  # noqa: SIM115 - closed in the finally below
        except FileNotFoundError:
            raise OffsetOutOfRange(f"offset {start} was trimmed while it was being read") from None
        try:
            handle.seek(at)
            buf = b""
            while base + number < stop:
                chunk = await asyncio.to_thread(handle.read, READ_CHUNK)
                if not chunk:
                    raise CorruptLog(
                        path, at, f"segment ends at offset {base + number}, {stop} expected"
                    )
                buf += chunk
                found, used, reason = _parse(buf, 0, stop - base - number, number, index, at)
                if reason is not None:
                    raise CorruptLog(path, at + used, reason)
                skip = max(0, start - base - number)
                number += len(found)
                at += used
                buf = buf[used:]
                if len(found) > skip:
                    yield found[skip:]
        finally:
            handle.close()

    async def trim(self, below: int) -> None:
        """Delete whole segments whose records are all below ``below``; never the active one."""
        doomed: list[int] = []
        while len(self._bases) > 1 and self._bases[1] <= below:
            doomed.append(self._bases.pop(0))
            self._index.pop(doomed[-1], None)
        if doomed:
            await asyncio.to_thread(self._unlink, doomed)

    def _unlink(self, bases: list[int]) -> None:
        for base in bases:
            self._path(base).unlink(missing_ok=True)
        _fsync_dir(self.directory)

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
