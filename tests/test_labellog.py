"""The label record encoding and the segment-file label log, on real files and real disks.

Full and failing disks are real: a tiny tmpfs (ENOSPC on write), the per-process file size
limit (EFBIG on write), and an ext2 image on a loop device whose backing tmpfs runs out, so the
kernel's writeback fails and fsync returns EIO (a thin-provisioned disk out of space).
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import logging
import os
import re
import resource
import signal
import struct
import subprocess
import zlib
from collections.abc import AsyncIterator, Iterator
from pathlib import Path

import msgpack
import numpy as np
import pytest

from conftest import IN_CI, _run, _unmount, mounted_tmpfs, require_binary
from thresher import records
from thresher.errors import LogUnavailable
from thresher.labellog import (
    READ_BATCH,
    SPARSE_EVERY,
    CorruptLog,
    FileLog,
    LabelLog,
    OffsetOutOfRange,
)

RECORD = {"id": "e1", "label": "fraud", "fields": {"title": "cheap", "price": 3.5},
          "source": "review", "served": "fine", "time": 1700000000.25}  # fmt: skip


def payload(i: int, size: int = 1024) -> bytes:
    return (f"<{i:07d}>".encode() * (size // 9 + 1))[:size]


def on_disk(directory: Path) -> list[bytes]:
    """Every payload in the segment files, read with only the documented format.

    Fails unless each file is exactly a header plus whole records with matching CRC-32s.
    """
    found: list[bytes] = []
    for path in sorted(directory.glob("*.seg")):
        data = path.read_bytes()
        magic, version, _, first = struct.unpack_from("<8sHHQ", data)
        assert (magic, version, first) == (b"THRLSEG\0", 1, int(path.stem)), path
        assert first == len(found), f"{path.name} does not start at offset {len(found)}"
        pos = 20
        while pos < len(data):
            length, crc = struct.unpack_from("<II", data, pos)
            body = data[pos + 8 : pos + 8 + length]
            assert len(body) == length and zlib.crc32(body) == crc, f"{path.name}@{pos}"
            found.append(body)
            pos += 8 + length
    return found


async def read_all(log: LabelLog, start: int = 0) -> list[tuple[int, bytes]]:
    return [item async for item in log.read(start)]


# -- records ------------------------------------------------------------------------------


def _six(record: dict[str, object]) -> dict[str, object]:
    """A decoded record's six keys, with its fields unpacked."""
    return {**{k: record[k] for k in RECORD if k != "fields"}, "fields": records.fields(record)}


def test_record_round_trip_and_wire_form() -> None:
    data = records.encode(RECORD)
    assert _six(records.decode(data)) == RECORD
    # Version 2 is a 10-element array (fixarray 0x9a) led by its version, with the fields as a
    # bin holding their own msgpack map.
    assert data[:2] == b"\x9a\x02"
    array = msgpack.unpackb(data)
    assert msgpack.unpackb(array[6]) == RECORD["fields"]
    assert array[7:] == [b"", b"", b""]  # no row: the reader featurizes the fields
    # The msgpack spec's own example (msgpack.org front page, from memory):
    # {"compact": true, "schema": 0} packs to 82 a7 "compact" c3 a6 "schema" 00.
    assert msgpack.unpackb(bytes.fromhex("82a7636f6d70616374c3a6736368656d6100")) == {
        "compact": True,
        "schema": 0,
    }
    # Strings are msgpack str (not bin) and time is a float64 (0xcb) even when given as int.
    assert b"\xa5fraud" in data
    whole = records.decode(records.encode({**RECORD, "time": 12}))
    assert isinstance(whole["time"], float) and whole["time"] == 12.0
    # Version 1, the map of the six keys, is still read as it always was.
    assert records.decode(msgpack.packb(RECORD, use_bin_type=True)) == RECORD


@pytest.mark.parametrize(
    ("change", "fragment"),
    [
        ({"label": 3}, "label must be a string"),
        ({"id": 7}, "id must be a string or null"),
        ({"fields": [1]}, "fields must be a map"),
        ({"time": float("nan")}, "time must be a finite number"),
        ({"time": True}, "time must be a finite number"),
    ],
)
def test_record_shape_is_checked(change: dict[str, object], fragment: str) -> None:
    bad = msgpack.packb({**RECORD, **change}, use_bin_type=True)
    with pytest.raises(records.CorruptRecord, match=fragment):
        records.decode(bad)
    with pytest.raises(records.CorruptRecord, match=fragment):
        records.encode({**RECORD, **change})


def test_record_rejects_non_records() -> None:
    with pytest.raises(records.CorruptRecord, match="lacks source"):
        records.decode(msgpack.packb({k: v for k, v in RECORD.items() if k != "source"}))
    with pytest.raises(records.CorruptRecord, match="must be a map"):
        records.decode(msgpack.packb([1, 2]))
    with pytest.raises(records.CorruptRecord, match="not valid msgpack"):
        records.decode(b"\xc1")  # 0xc1 is the one byte the msgpack spec never uses
    with pytest.raises(records.CorruptRecord, match="not valid msgpack"):
        records.decode(records.encode(RECORD)[:-3])


def test_fingerprint_names_everything_a_row_depends_on() -> None:
    spec = {"fields": {"title": {"kind": "text"}}}
    key = records.fingerprint(spec, bits=20, seed=0, signed=True)
    assert len(key) == 8 and key == records.fingerprint(dict(spec), bits=20, seed=0, signed=True)
    others = [
        records.fingerprint(spec, bits=21, seed=0, signed=True),
        records.fingerprint(spec, bits=20, seed=1, signed=True),
        records.fingerprint(spec, bits=20, seed=0, signed=False),
        records.fingerprint({"fields": {"title": {"kind": "categorical"}}}, bits=20, seed=0,
                            signed=True),
    ]  # fmt: skip
    assert len({key, *others}) == 5


def test_packed_fields_are_checked_when_first_unpacked() -> None:
    key = b"12345678"
    row = (struct.pack("<2I", 3, 9), struct.pack("<2f", 1.0, -2.0))
    good = records.encode(RECORD, (np.array([3, 9]), np.array([1.0, -2.0], np.float32)), key)
    array = msgpack.unpackb(good)
    assert (array[7], array[8], array[9]) == (key, *row)  # little-endian uint32 and float32
    array[6] = msgpack.packb(["not", "a", "map"])
    bad = msgpack.packb(array, use_bin_type=True)
    # Under another key the fields are featurized, so they are checked at once ...
    with pytest.raises(records.CorruptRecord, match="fields must be a map"):
        records.decode(bad)
    # ... under the model's own key the row is learned and the fields wait until read.
    record = records.decode(bad, key, 10)
    assert record["row"] == row
    with pytest.raises(records.CorruptRecord, match="fields must be a map"):
        records.fields(record)


def _decoded_one_by_one(payloads: list[bytes]) -> tuple[list[object], str | None]:
    out = []
    for data in payloads:
        try:
            out.append(records.decode(data))
        except records.CorruptRecord as exc:
            return out, str(exc)
    return out, None


def _packed(record: dict[str, object]) -> bytes:
    return msgpack.packb(record, use_bin_type=True)


@pytest.mark.parametrize(
    ("where", "bad"),
    [
        (None, b""),  # every payload a record
        (5, b"\xc1"),  # not msgpack
        (5, b""),  # empty: the stream would read the next payload as this one's record
        (5, records.encode(RECORD) + b"\x01"),  # a record and a stray byte
        (5, records.encode(RECORD)[:-4]),  # a torn record: completed by the next payload
        (9, records.encode(RECORD)[:-4]),  # torn and last
        (5, _packed([1, 2])),
        (5, _packed({**RECORD, "time": float("inf")})),
        (5, _packed({**RECORD, "fields": {b"title": "cheap"}})),  # a bytes key (bin type)
        (5, _packed({k: v for k, v in RECORD.items() if k != "served"})),
    ],
)
def test_decode_many_fails_as_decode_does_on_each(where: int | None, bad: bytes) -> None:
    payloads = [records.encode({**RECORD, "id": f"e{i}", "time": 1.0 + i}) for i in range(10)]
    # Unusual but well-formed, after the bad payload: an integer time and extra keys are
    # accepted by the exact check, to which the rest of the run then falls back.
    payloads[7] = _packed({**RECORD, "time": 7, "extra": [1, {"x": None}]})
    payloads[8] = _packed({"time": 2.5, **{k: v for k, v in RECORD.items() if k != "time"}})
    if where is not None:
        payloads[where] = bad
    want, error = _decoded_one_by_one(payloads)
    got, exc = records.decode_many(payloads)
    assert got == want
    assert (None if exc is None else str(exc)) == error
    assert (error is None) == (where is None)
    assert all(type(r["time"]) is type(w["time"]) for r, w in zip(got, want, strict=True))


def test_decode_many_of_nothing() -> None:
    assert records.decode_many([]) == ([], None)


# -- appending and reading ----------------------------------------------------------------


async def test_append_read_head_first_and_reopen(tmp_path: Path) -> None:
    # CRC-32 check value of "123456789" is 0xCBF43926 (the CRC catalogue's check, from
    # memory); the on-disk reader below relies on zlib computing exactly that CRC.
    assert zlib.crc32(b"123456789") == 0xCBF43926
    log = await FileLog.open(tmp_path / "log")
    assert (log.head(), log.first()) == (0, 0)
    assert await log.append([b"a", b"bb"]) == 0
    assert await log.append([b"ccc"]) == 2
    assert log.head() == 3
    assert await read_all(log) == [(0, b"a"), (1, b"bb"), (2, b"ccc")]
    assert await read_all(log, 2) == [(2, b"ccc")]
    assert await read_all(log, 3) == []
    with pytest.raises(OffsetOutOfRange, match=r"holds 0\.\.3"):
        await read_all(log, 4)
    with pytest.raises(ValueError, match="at least one"):
        await log.append([])
    with pytest.raises(ValueError, match=r"1\.\.16777216 bytes"):
        await log.append([b""])
    await log.close()
    await log.close()  # a second close is harmless
    with pytest.raises(LogUnavailable, match="closed"):
        await log.append([b"late"])
    assert on_disk(tmp_path / "log") == [b"a", b"bb", b"ccc"]
    again = await FileLog.open(tmp_path / "log")
    assert (again.head(), again.recovered_bytes_dropped) == (3, 0)
    assert await again.append([b"dddd"]) == 3
    assert [p for _, p in await read_all(again)] == [b"a", b"bb", b"ccc", b"dddd"]
    await again.close()


@pytest.mark.parametrize("start", [0, 150, 299, 300, 420, 600])
async def test_first_read_after_open_takes_what_recovery_checked(
    tmp_path: Path, start: int
) -> None:
    # Recovery reads and checks the whole last segment; the first read after opening takes
    # those payloads. It must give exactly what reading the files gives, from any offset.
    log = await FileLog.open(tmp_path / "log", segment_bytes=300 * 1040)
    for lo in range(0, 600, 50):
        await log.append([payload(i) for i in range(lo, lo + 50)])
    assert log.segments == 2
    await log.close()
    want = on_disk(tmp_path / "log")
    again = await FileLog.open(tmp_path / "log", segment_bytes=300 * 1040)
    assert again._recovered is not None and again._recovered[0] == 300
    assert [p for _, p in await read_all(again, start)] == want[start:]
    assert again._recovered is None  # read once only: a later read checks the file again
    assert [p for _, p in await read_all(again, start)] == want[start:]
    await again.close()
    # An append first: the read covers it, from the files.
    again = await FileLog.open(tmp_path / "log", segment_bytes=300 * 1040)
    await again.append([b"late"])
    assert [p for _, p in await read_all(again, start)] == [*want[start:], b"late"]
    await again.close()


async def test_one_writer_per_directory(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log")
    with pytest.raises(LogUnavailable, match="open elsewhere"):
        await FileLog.open(tmp_path / "log")
    await log.close()
    await (await FileLog.open(tmp_path / "log")).close()


async def test_rotation_sparse_index_and_trim(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log", segment_bytes=8192)
    expected = [payload(i, 100) for i in range(1000)]
    for i in range(0, 1000, 10):
        assert await log.append(expected[i : i + 10]) == i
    names = sorted(p.name for p in (tmp_path / "log").glob("*.seg"))
    assert len(names) == log.segments > 10
    assert names[0] == "00000000000000000000.seg"
    assert all(os.path.getsize(tmp_path / "log" / n) <= 8192 for n in names)
    assert on_disk(tmp_path / "log") == expected
    # Reading from every start gives exactly the tail, whichever segment and index entry.
    for start in (0, 1, 79, 80, 255, 256, 257, 513, 999, 1000):
        got = await read_all(log, start)
        assert got == list(enumerate(expected))[start:], start
        batches = [batch async for batch in log.read_batches(start)]
        assert all(batches) and list(itertools.chain(*batches)) == expected[start:], start
    bases = [int(n[:20]) for n in names]
    await log.trim(bases[3] + 1)
    assert log.first() == bases[3]
    assert await read_all(log, bases[3]) == list(enumerate(expected))[bases[3] :]
    with pytest.raises(OffsetOutOfRange):
        await read_all(log, bases[3] - 1)
    await log.trim(10**9)  # never the active segment
    assert (log.first(), log.head(), log.segments) == (bases[-1], 1000, 1)
    await log.close()
    again = await FileLog.open(tmp_path / "log", segment_bytes=8192)
    assert (again.first(), again.head()) == (bases[-1], 1000)
    assert await again.append([b"next"]) == 1000
    await again.close()


async def test_sparse_index_of_appends_equals_the_one_a_scan_builds(tmp_path: Path) -> None:
    # Appends of every size, some holding several indexed records, some none: the positions
    # noted while appending are those recovery finds by scanning the segment on open.
    log = await FileLog.open(tmp_path / "log")
    sizes = [1, 255, 1, 600, 3, 256, 512, 40, 1000, 7]
    expected = [payload(i, 5 + i % 37) for i in range(sum(sizes))]
    at = 0
    for size in sizes:
        await log.append(expected[at : at + size])
        at += size
    noted = list(log._index[0])
    assert len(noted) == 1 + len(expected) // SPARSE_EVERY
    await log.close()
    again = await FileLog.open(tmp_path / "log")
    assert again._index[0] == noted
    for start in (0, 255, 256, 257, 1500, len(expected) - 1):
        assert await read_all(again, start) == list(enumerate(expected))[start:], start
    await again.close()


class _ListLog(LabelLog):
    """A log in a list: only what `LabelLog` itself provides is under test."""

    def __init__(self, payloads: list[bytes]) -> None:
        self.payloads = payloads

    async def append(self, payloads: list[bytes]) -> int:
        self.payloads += payloads
        return len(self.payloads) - len(payloads)

    async def read(self, start: int) -> AsyncIterator[tuple[int, bytes]]:
        for offset in range(start, len(self.payloads)):
            yield offset, self.payloads[offset]

    def head(self) -> int:
        return len(self.payloads)

    def first(self) -> int:
        return 0

    async def trim(self, below: int) -> None:
        pass

    async def close(self) -> None:
        pass


@pytest.mark.parametrize(("n", "start"), [(0, 0), (5, 2), (READ_BATCH, 0), (2 * READ_BATCH + 3, 1)])
async def test_read_batches_of_any_log_are_its_reads_in_lists(n: int, start: int) -> None:
    log = _ListLog([payload(i, 12) for i in range(n)])
    batches = [batch async for batch in log.read_batches(start)]
    assert all(0 < len(batch) <= READ_BATCH for batch in batches)
    assert list(itertools.chain(*batches)) == [p for _, p in await read_all(log, start)]


async def test_tiny_segments_hold_one_append_each(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log", segment_bytes=1)
    for i in range(0, 12, 3):
        assert await log.append([payload(k, 10) for k in range(i, i + 3)]) == i
    assert sorted(int(p.stem) for p in (tmp_path / "log").glob("*.seg")) == [0, 3, 6, 9]
    assert [p for _, p in await read_all(log, 4)] == [payload(k, 10) for k in range(4, 12)]
    await log.close()


async def test_group_commit_keeps_offsets_dense_and_in_call_order(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log")
    given: dict[int, list[bytes]] = {}
    firsts: dict[int, list[int]] = {w: [] for w in range(32)}

    async def appender(worker: int) -> None:
        for i in range(25):
            batch = [f"{worker}/{i}/{k}".encode() for k in range(3)]
            first = await log.append(batch)
            given[first] = batch
            firsts[worker].append(first)

    await asyncio.gather(*(appender(w) for w in range(32)))
    # The first round starts in gather order, so offsets follow the order of the calls.
    assert [firsts[w][0] for w in range(32)] == [3 * w for w in range(32)]
    assert all(f == sorted(f) for f in firsts.values())
    assert sorted(given) == list(range(0, 32 * 25 * 3, 3))
    flat = [p for first in sorted(given) for p in given[first]]
    assert [p for _, p in await read_all(log)] == flat
    assert log.appends == 800
    assert log.fsyncs * 4 <= log.appends, f"{log.fsyncs} fsyncs for {log.appends} appends"
    await log.close()


async def test_read_stops_at_the_head_it_started_with(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log")
    await log.append([payload(i) for i in range(5)])
    seen = []
    async for offset, _ in log.read(0):
        seen.append(offset)
        if offset == 1:
            await log.append([b"later"])
    assert seen == [0, 1, 2, 3, 4]
    await log.close()


async def test_head_counts_only_fsynced_records(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log")
    assert isinstance(log, LabelLog)
    await log.append([b"a"])
    pending = asyncio.ensure_future(log.append([b"b", b"c"]))
    await asyncio.sleep(0)  # the bytes are written; their fsync has not run yet
    assert log.bytes_written == 3 * 8 + 3 and log.head() == 1
    assert await read_all(log) == [(0, b"a")]
    assert await pending == 1 and log.head() == 3
    await log.close()


async def test_followers_read_while_appends_rotate_segments(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log", segment_bytes=4096)
    expected = [payload(i, 150) for i in range(600)]

    async def writer() -> None:
        for i in range(0, 600, 6):
            await log.append(expected[i : i + 6])

    async def follower() -> int:
        position, reads = 0, 0
        while position < 600:
            async for offset, body in log.read(position):
                assert offset == position and body == expected[offset]
                position += 1
            reads += 1
            await asyncio.sleep(0)
        return reads

    _, reads = await asyncio.gather(writer(), follower())
    assert reads > 1 and log.rotations > 10
    await log.close()


async def test_interval_policy_acknowledges_before_fsync(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log", flush="interval", interval_ms=60_000)
    assert await log.append([b"x", b"y"]) == 0
    assert (log.head(), log.durable_head, log.fsyncs) == (2, 0, 0)
    assert await read_all(log) == [(0, b"x"), (1, b"y")]
    await log.close()  # close makes the window durable
    assert (log.durable_head, log.fsyncs) == (2, 1)
    fast = await FileLog.open(tmp_path / "log", flush="interval", interval_ms=5)
    await fast.append([b"z"])
    for _ in range(200):
        if fast.durable_head == 3:
            break
        await asyncio.sleep(0.005)
    assert fast.durable_head == 3 and fast.fsyncs >= 1
    await fast.close()


# -- recovery -----------------------------------------------------------------------------


async def _fill(directory: Path, count: int = 10, size: int = 100) -> Path:
    log = await FileLog.open(directory)
    for i in range(count):
        await log.append([payload(i, size)])
    await log.close()
    return directory / "00000000000000000000.seg"


@pytest.mark.parametrize(
    ("damage", "dropped", "at"),
    [
        ("cut 3 bytes", 105, 9),
        ("cut inside the frame header", 4, 9),
        ("append garbage", 37, 10),
        ("append zeros", 4096, 10),
        ("flip a payload byte", 108, 9),
    ],
)
async def test_torn_tail_is_cut_and_logged(
    tmp_path: Path, caplog: pytest.LogCaptureFixture, damage: str, dropped: int, at: int
) -> None:
    seg = await _fill(tmp_path / "log")
    size = seg.stat().st_size
    assert size == 20 + 10 * 108
    data = bytearray(seg.read_bytes())
    if damage == "cut 3 bytes":
        del data[-3:]
    elif damage == "cut inside the frame header":
        del data[-104:]
    elif damage == "append garbage":
        data += bytes(range(7, 44))
    elif damage == "append zeros":
        data += bytes(4096)
    else:
        data[-50] ^= 0x40
    seg.write_bytes(bytes(data))
    with caplog.at_level(logging.WARNING, logger="thresher.log"):
        log = await FileLog.open(tmp_path / "log")
    assert log.recovered_bytes_dropped == dropped
    assert log.recovered_at == at
    assert f"dropped {dropped} bytes" in caplog.text and f"at offset {at}" in caplog.text
    assert seg.stat().st_size == 20 + at * 108
    assert await log.append([b"after"]) == at
    assert on_disk(tmp_path / "log") == [payload(i, 100) for i in range(at)] + [b"after"]
    await log.close()


async def test_torn_segment_header_is_rebuilt(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    await _fill(tmp_path / "log")
    # A crash during rotation: the next segment exists with only part of its header.
    (tmp_path / "log" / "00000000000000000010.seg").write_bytes(b"THRLS")
    with caplog.at_level(logging.WARNING, logger="thresher.log"):
        log = await FileLog.open(tmp_path / "log")
    assert (log.head(), log.recovered_bytes_dropped, log.segments) == (10, 5, 2)
    assert "dropped 5 bytes" in caplog.text
    assert await log.append([b"after"]) == 10
    assert len(on_disk(tmp_path / "log")) == 11
    await log.close()


async def test_damage_inside_a_closed_segment_is_an_error(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log", segment_bytes=4096)
    for i in range(0, 120, 4):
        await log.append([payload(j, 200) for j in range(i, i + 4)])
    await log.close()
    segs = sorted((tmp_path / "log").glob("*.seg"))
    assert len(segs) >= 4
    first = segs[0].read_bytes()
    flipped = bytearray(first)
    flipped[20 + 8 + 208 + 5] ^= 0x01  # inside the second record's payload
    segs[0].write_bytes(bytes(flipped))
    log = await FileLog.open(tmp_path / "log", segment_bytes=4096)
    assert (log.head(), log.recovered_bytes_dropped) == (120, 0)
    with pytest.raises(CorruptLog) as err:
        await read_all(log)
    assert err.value.path == segs[0] and err.value.position == 20 + 208
    assert segs[0].name in str(err.value) and "byte 228" in str(err.value)
    assert "CRC-32 mismatch" in str(err.value)
    # Later segments still read, and nothing was cut from the damaged one.
    later = int(segs[1].stem)
    assert len(await read_all(log, later)) == 120 - later
    assert segs[0].stat().st_size == len(first)
    segs[0].write_bytes(first)
    segs[1].write_bytes(segs[1].read_bytes()[:-10])  # a closed segment cut short
    with pytest.raises(CorruptLog, match=f"{segs[1].name} is corrupt .* segment ends"):
        await read_all(log)
    await log.close()
    segs[2].write_bytes(b"XXXXXXXX" + segs[2].read_bytes()[8:])
    with pytest.raises(CorruptLog, match="bad magic"):
        await FileLog.open(tmp_path / "log")


# -- failing disks ------------------------------------------------------------------------


def fill_up(path: Path, leave: int = 0) -> None:
    """Write ``path`` until its filesystem has at most ``leave`` bytes free."""
    with open(path, "wb", buffering=0) as handle, contextlib.suppress(OSError):
        while True:
            stat = os.statvfs(path)
            if stat.f_bavail * stat.f_frsize <= leave:
                break
            handle.write(bytes(4096))


async def test_full_tmpfs_refuses_cleanly_and_recovers(tmp_path: Path) -> None:
    with mounted_tmpfs(tmp_path / "disk", "256k") as disk:
        log = await FileLog.open(disk / "log", segment_bytes=64 * 1024)
        fill_up(disk / "filler", leave=48 * 1024)
        acked: list[bytes] = []
        with pytest.raises(LogUnavailable) as err:
            for i in range(1000):
                batch = [payload(i * 5 + k) for k in range(5)]
                assert await log.append(batch) == len(acked)
                acked += batch
        detail = err.value.detail
        assert "label log cannot write: No space left on device (ENOSPC" in detail
        assert detail.endswith("nothing from this request was acknowledged")
        assert err.value.status == 503 and len(acked) > 0
        assert log.head() == len(acked) and log.write_errors >= 1
        assert on_disk(disk / "log") == acked  # no partial record left behind
        with pytest.raises(LogUnavailable):
            await log.append([payload(0)] * 5)
        assert log.head() == len(acked)
        (disk / "filler").unlink()
        assert await log.append([b"space is back"]) == len(acked)
        await log.close()
        again = await FileLog.open(disk / "log", segment_bytes=64 * 1024)
        assert again.recovered_bytes_dropped == 0
        assert [p for _, p in await read_all(again)] == [*acked, b"space is back"]
        await again.close()


async def test_file_size_limit_refuses_cleanly_and_recovers(tmp_path: Path) -> None:
    log = await FileLog.open(tmp_path / "log")
    await log.append([payload(i) for i in range(4)])
    soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
    previous = signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # get EFBIG, not a kill
    try:
        resource.setrlimit(resource.RLIMIT_FSIZE, (10_000, hard))
        for i in range(4, 9):
            assert await log.append([payload(i)]) == i
        with pytest.raises(LogUnavailable, match=r"File too large \(EFBIG"):
            await log.append([payload(9), payload(10)])  # the write stops part way
    finally:
        resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
        signal.signal(signal.SIGXFSZ, previous)
    assert log.head() == 9
    assert on_disk(tmp_path / "log") == [payload(i) for i in range(9)]
    assert await log.append([payload(9)]) == 9
    await log.close()


@pytest.fixture
def thin_disk(tmp_path: Path) -> Iterator[tuple[Path, Path]]:
    """An ext2 filesystem on a loop device over a sparse image on a 4 MiB tmpfs.

    The filesystem believes it has 16 MiB; once the tmpfs is full, writeback of new blocks
    fails and fsync reports EIO. Yields (mount point, backing directory).
    """
    mkfs = require_binary("mkfs.ext2")
    losetup = require_binary("losetup")
    back, mnt = tmp_path / "back", tmp_path / "mnt"
    with mounted_tmpfs(back, "4m"):
        image = back / "disk.img"
        with open(image, "wb") as handle:
            handle.truncate(16 * 1024 * 1024)
        _run(mkfs, "-q", "-F", str(image))
        done = subprocess.run(
            [losetup, "-f", "--show", str(image)], capture_output=True, timeout=60
        )
        if done.returncode != 0:
            message = f"cannot attach a loop device here: {done.stderr.decode().strip()}"
            if IN_CI:
                pytest.fail(message)
            pytest.skip(message)
        device = done.stdout.decode().strip()
        try:
            mnt.mkdir()
            _run("mount", device, str(mnt))
            try:
                yield mnt, back
            finally:
                _unmount(mnt)
        finally:
            # Unmounting usually frees the device already (autoclear); detach in case not.
            subprocess.run([losetup, "-d", device], capture_output=True, timeout=60)


async def test_fsync_failure_acknowledges_nothing_and_recovers(
    thin_disk: tuple[Path, Path],
) -> None:
    mnt, back = thin_disk
    log = await FileLog.open(mnt / "log")
    acked = [payload(i) for i in range(16)]
    assert await log.append(acked) == 0
    fill_up(back / "filler")
    big = [os.urandom(64 * 1024) for _ in range(4)]
    results = await asyncio.gather(*(log.append(big) for _ in range(4)), return_exceptions=True)
    assert all(isinstance(r, LogUnavailable) for r in results), results
    # The kernel reports the lost writeback as EIO or, on newer kernels, as ENOSPC.
    assert re.search(r"cannot write: .* \((EIO|ENOSPC) on segment", str(results[0]))
    assert log.head() == 16 and log.sync_errors >= 1 and log.write_errors == 0
    assert on_disk(mnt / "log") == acked  # the unacknowledged bytes were cut off
    (back / "filler").unlink()
    assert await log.append([b"after"]) == 16
    await log.close()
    _run("umount", str(mnt))  # read back what is really on the device, not the page cache
    loop = subprocess.run(
        ["losetup", "-j", str(back / "disk.img")], capture_output=True, timeout=60, check=True
    )
    _run("mount", loop.stdout.decode().split(":")[0], str(mnt))
    again = await FileLog.open(mnt / "log")
    assert again.recovered_bytes_dropped == 0
    assert [p for _, p in await read_all(again)] == [*acked, b"after"]
    await again.close()
