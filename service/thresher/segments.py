"""Label log segment files: their format, record parsing, and recovery when a log is opened.

A segment file holds a 20-byte header (magic ``THRLSEG\\0``, u16 format version, u16 zero,
u64 first offset) and then records, each a little-endian u32 payload length, the u32 CRC-32
of the payload, and the payload. Files are named by their first offset, so the offsets of a
closed segment are known without reading it and only the last segment is scanned on open.
Recovery cuts a torn or corrupt tail off the last segment (records past it were never
acknowledged) and refuses damage anywhere else with :class:`CorruptLog`.
:class:`~thresher.labellog.FileLog` appends and reads these files.
"""

from __future__ import annotations

import asyncio
import logging
import os
import struct
import zlib
from collections.abc import AsyncIterator
from pathlib import Path
from typing import NamedTuple

try:  # the compiled fast path of `frame_records` (_records.c); the Python below is its reference
    from . import _records
except ImportError:  # pragma: no cover - a build without the C extension
    _records = None  # type: ignore[assignment]

MAGIC = b"THRLSEG\0"
VERSION = 1
HEADER = struct.Struct("<8sHHQ")
FRAME = struct.Struct("<II")
SUFFIX = ".seg"
MAX_RECORD_BYTES = 16 * 1024 * 1024
READ_CHUNK = 1 << 20
SPARSE_EVERY = 256  # one remembered file position per this many records of a segment

_log = logging.getLogger("thresher.log")


class OffsetOutOfRange(LookupError):
    """A read started below the first retained offset or above the head."""


class CorruptLog(Exception):
    """A segment fails its checks where records were acknowledged; nothing is dropped."""

    def __init__(self, path: Path, position: int, reason: str) -> None:
        super().__init__(
            f"label log segment {path} is corrupt at byte {position}: {reason}; acknowledged "
            "records would be lost by skipping it, so restore the file or rebuild the model"
        )
        self.path, self.position, self.reason = path, position, reason


def segment_path(directory: Path, base: int) -> Path:
    """The file of the segment whose first offset is ``base``."""
    return directory / f"{base:020d}{SUFFIX}"


def frame_records(payloads: list[bytes]) -> bytes:
    """The records as they are appended: each payload after its length and CRC-32."""
    if _records is not None:
        made = _records.frame(payloads, zlib.crc32, MAX_RECORD_BYTES)
        if made is not None:
            return made  # type: ignore[no-any-return]
    return frame_records_reference(payloads)


def frame_records_reference(payloads: list[bytes]) -> bytes:
    """:func:`frame_records` in Python, the reference of its compiled path: that path hands
    over every call it does not take, and this frames it or raises the exact error."""
    if not payloads:
        raise ValueError("append needs at least one payload")
    parts: list[bytes] = []
    for payload in payloads:
        if not isinstance(payload, bytes) or not 0 < len(payload) <= MAX_RECORD_BYTES:
            raise ValueError(f"a payload must be 1..{MAX_RECORD_BYTES} bytes")
        parts += (FRAME.pack(len(payload), zlib.crc32(payload)), payload)
    return b"".join(parts)


def parse_records(
    buf: bytes, pos: int, count: int, rel: int, index: list[int], at: int
) -> tuple[list[bytes], int, str | None]:
    """Parse up to ``count`` records; return them, the end position, and why parsing stopped.

    ``rel`` is the first record's number within its segment and ``at`` the file position of
    ``buf[0]``, so that sparse-index positions can be recorded as the scan passes them.
    A ``None`` reason with fewer than ``count`` records means the buffer ran out.
    """
    out: list[bytes] = []
    append, unpack, crc32 = out.append, FRAME.unpack_from, zlib.crc32  # a hot loop at open
    size = len(buf)
    mark = len(index) * SPARSE_EVERY - rel  # the record of ``out`` the index wants next
    for number in range(count):
        if pos + 8 > size:
            return out, pos, None
        length, crc = unpack(buf, pos)
        if length == 0 or length > MAX_RECORD_BYTES:
            return out, pos, f"impossible record length {length}"
        stop = pos + 8 + length
        if stop > size:
            return out, pos, None
        payload = buf[pos + 8 : stop]
        if crc32(payload) != crc:
            return out, pos, "CRC-32 mismatch"
        if number == mark:
            index.append(at + pos)
            mark += SPARSE_EVERY
        append(payload)
        pos = stop
    return out, pos, None


async def read_segment(
    path: Path, base: int, index: list[int], start: int, stop: int
) -> AsyncIterator[list[bytes]]:
    """Batches of the records ``start..stop`` of the segment at ``path`` whose first offset is
    ``base``, every CRC checked; ``index`` is its sparse index, extended as the scan passes."""
    k = min((start - base) // SPARSE_EVERY, len(index) - 1)
    at, number = index[k], k * SPARSE_EVERY
    try:
        handle = open(path, "rb")  # noqa: SIM115 - closed in the finally below
    except FileNotFoundError:
        raise OffsetOutOfRange(f"offset {start} was trimmed while it was being read") from None
    handle.seek(at)
    # The next chunk is read in a worker thread while this one is parsed and its records
    # applied, so a replay does not wait for each read in turn.
    ahead = asyncio.ensure_future(asyncio.to_thread(handle.read, READ_CHUNK))
    try:
        buf = b""
        while base + number < stop:
            chunk = await ahead
            ahead = asyncio.ensure_future(asyncio.to_thread(handle.read, READ_CHUNK))
            if not chunk:
                raise CorruptLog(
                    path, at, f"segment ends at offset {base + number}, {stop} expected"
                )
            buf += chunk
            found, used, reason = parse_records(buf, 0, stop - base - number, number, index, at)
            if reason is not None:
                raise CorruptLog(path, at + used, reason)
            skip = max(0, start - base - number)
            number += len(found)
            at += used
            buf = buf[used:]
            if len(found) > skip:
                yield found[skip:]
    finally:
        await asyncio.wait({ahead})  # a worker thread must not read a closed file
        handle.close()


def fsync_dir(directory: Path) -> None:
    """Make the directory's entries (created, renamed or removed files) durable."""
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def check_header(path: Path, base: int, header: bytes) -> None:
    """Raise :class:`CorruptLog` unless ``header`` opens the segment named for ``base``."""
    if len(header) < HEADER.size:
        raise CorruptLog(path, len(header), "segment header is short")
    magic, version, _, first = HEADER.unpack(header)
    if magic != MAGIC:
        raise CorruptLog(path, 0, "not a thresher label log segment (bad magic)")
    if version != VERSION:
        raise CorruptLog(path, 8, f"segment format version {version}, this build reads 1")
    if first != base:
        raise CorruptLog(path, 12, f"header says first offset {first}, the name says {base}")


def create_segment(directory: Path, base: int, index: dict[int, list[int]]) -> int:
    """Create a segment holding only its header, durable with its directory entry.

    Returns its file descriptor, open for appending, and starts its sparse ``index`` entry.
    """
    path = segment_path(directory, base)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_APPEND, 0o644)
    try:
        os.write(fd, HEADER.pack(MAGIC, VERSION, 0, base))
        os.fsync(fd)
        fsync_dir(directory)
    except BaseException:
        os.close(fd)
        path.unlink(missing_ok=True)
        raise
    index[base] = [HEADER.size]
    return fd


class Recovery(NamedTuple):
    """What opening a log directory found and repaired."""

    bases: list[int]  # first offset of every segment, oldest first
    written: int  # the offset the next record gets
    pos: int  # the file position where the last segment's next record goes
    dropped: int  # bytes cut off a torn or corrupt tail
    at: int | None  # offset where a tail was cut, if one was
    tail: list[bytes]  # the payloads of the last segment, every CRC checked


def recover(directory: Path, index: dict[int, list[int]]) -> Recovery:
    """Check every segment header and cut a torn tail off the last one; fills ``index``."""
    names = sorted(p.name for p in directory.glob("*" + SUFFIX))
    bases = [int(n[:20]) for n in names if len(n) == 20 + len(SUFFIX) and n[:20].isdigit()]
    if not bases:
        os.close(create_segment(directory, 0, index))
        bases = [0]
    for base in bases[:-1]:
        with open(segment_path(directory, base), "rb") as handle:
            check_header(segment_path(directory, base), base, handle.read(HEADER.size))
    dropped, at = 0, None
    base = bases[-1]
    path = segment_path(directory, base)
    data = path.read_bytes()
    if len(data) < HEADER.size:  # a crash while the segment was being created
        _warn_cut(directory, path, base, 0, len(data), "segment header torn")
        dropped, at = dropped + len(data), base
        path.unlink()
        os.close(create_segment(directory, base, index))
        data = path.read_bytes()
    check_header(path, base, data[: HEADER.size])
    found, end, reason = parse_records(
        data, HEADER.size, len(data), 0, index.setdefault(base, []), 0
    )
    written = base + len(found)
    if end < len(data):
        _warn_cut(directory, path, written, end, len(data) - end, reason or "torn record")
        dropped, at = dropped + len(data) - end, written
        with open(path, "r+b") as handle:
            handle.truncate(end)
            os.fsync(handle.fileno())
    return Recovery(bases, written, end, dropped, at, found)


def _warn_cut(
    directory: Path, path: Path, offset: int, position: int, dropped: int, reason: str
) -> None:
    _log.warning(
        "label log %s: dropped %d bytes of a torn or corrupt tail at offset %d "
        "(byte %d of %s): %s",
        directory, dropped, offset, position, path.name, reason,
    )  # fmt: skip
