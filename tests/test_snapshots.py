"""Snapshot files and the generation store, on real files (and a real full tmpfs)."""

from __future__ import annotations

import hashlib
import logging
import os
import struct
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import pytest

from conftest import mounted_tmpfs
from thresher.errors import NotFound, Unavailable
from thresher.snapshots import (
    CorruptSnapshot,
    SnapshotStore,
    Sparse,
    capture,
    decode,
    encode,
    read_header,
)


def same_bits(a: Any, b: Any) -> bool:
    """Equal dtype, shape and every bit (NaN payloads and the sign of zero included)."""
    a, b = np.asarray(a), np.asarray(b)
    if a.dtype != b.dtype or a.shape != b.shape:
        return False
    return np.ascontiguousarray(a).tobytes() == np.ascontiguousarray(b).tobytes()


def special_floats() -> np.ndarray:
    """float32 values whose bits matter: -0.0, a quiet NaN with a payload, a signalling NaN."""
    return np.array([0x80000000, 0x7FC00001, 0xFF800001, 0x00000001], dtype=np.uint32).view(
        np.float32
    )


def sample_state(rng: np.random.Generator) -> dict[str, Any]:
    dense = rng.standard_normal((2, 300)).astype(np.float32)
    dense[0, :4] = special_floats()
    sparse = np.zeros(1 << 16, dtype=np.float32)
    sparse[[3, 999, 65535, 12345]] = special_floats()
    return {
        "learner": {"weights": dense, "sparse": sparse, "bits": 16, "rule": "averaged"},
        "quality": {"counts": np.arange(12, dtype=np.int64).reshape(3, 4), "windows": [1, 2.5]},
        "misc": [None, True, b"\x00\xff", "text", {7: "int key"}, np.float32(np.nan)],
    }


def check_state(got: dict[str, Any], want: dict[str, Any]) -> None:
    for key in ("weights", "sparse"):
        assert same_bits(got["learner"][key], want["learner"][key]), key
    assert same_bits(got["quality"]["counts"], want["quality"]["counts"])
    assert got["learner"]["bits"] == 16 and got["quality"]["windows"] == [1, 2.5]
    assert got["misc"][:5] == [None, True, b"\x00\xff", "text", {7: "int key"}]
    scalar = got["misc"][5]
    assert isinstance(scalar, np.float32) and scalar.tobytes() == want["misc"][5].tobytes()


# -- the file format ----------------------------------------------------------------------


def test_layout_and_checksum() -> None:
    # FIPS 180-2 example: SHA-256("abc") (from memory).
    assert hashlib.sha256(b"abc").hexdigest() == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    )
    data = encode({"a": 1}, meta={"generation": 3})
    magic, version, length = struct.unpack_from("<8sHI", data)
    assert (magic, version) == (b"THRSNAP\0", 1)
    assert msgpack.unpackb(data[14 : 14 + length]) == {"generation": 3}
    assert data[-32:] == hashlib.sha256(data[:-32]).digest()
    assert read_header(data)[0] == {"generation": 3}
    assert decode(data) == {"a": 1}


def test_round_trip_is_bit_exact_for_every_kind() -> None:
    rng = np.random.default_rng(7)
    state = sample_state(rng)
    check_state(decode(encode(state)), state)
    arrays: dict[str, np.ndarray] = {
        "f64": rng.standard_normal(50),
        "f16": rng.standard_normal(9).astype(np.float16),
        "big_endian": rng.standard_normal(8).astype(">f4"),
        "c64": (rng.standard_normal(6) + 1j * rng.standard_normal(6)).astype(np.complex64),
        "c128_sparse": np.zeros(1000, dtype=np.complex128),
        "u8": rng.integers(0, 255, 40, dtype=np.uint8),
        "bool": rng.random(33) > 0.5,
        "i32_3d": rng.integers(-5, 5, (3, 4, 5), dtype=np.int32),
        "scalar_0d": np.array(-0.0),
        "empty": np.zeros((0, 4), dtype=np.float32),
        "strided": rng.standard_normal((10, 10)).astype(np.float32)[::3, ::-2],
        "transposed": rng.standard_normal((4, 6)).T,
    }
    arrays["c128_sparse"].real[17] = -0.0  # 16-byte items: zero means all 16 bytes zero
    got = decode(encode({"nested": [arrays]}))["nested"][0]
    for name, array in arrays.items():
        assert same_bits(got[name], array), name
        assert got[name].flags.writeable, name
    assert np.signbit(got["c128_sparse"][17].real)


def test_sparse_or_dense_whichever_is_smaller() -> None:
    mostly_zero = np.zeros(1 << 20, dtype=np.float32)
    mostly_zero[[1, 500_000]] = [-0.0, 2.0]  # -0.0 has a bit set, so it is stored
    small = encode({"w": mostly_zero})
    assert len(small) < 1000
    back = decode(small)["w"]
    assert same_bits(back, mostly_zero) and np.signbit(back[1])
    dense = np.random.default_rng(1).standard_normal(1 << 16).astype(np.float32)
    assert (1 << 18) <= len(encode({"w": dense})) < (1 << 18) + 1000
    half = dense.copy()
    half[::2] = 0.0  # at half full, 8 bytes per stored value cost as much as dense
    assert (1 << 18) <= len(encode({"w": half})) < (1 << 18) + 1000


def test_capture_takes_what_the_file_stores_in_slices() -> None:
    rng = np.random.default_rng(11)
    sparse = np.zeros((3, 5000), dtype=np.float32)
    sparse[[0, 1, 2, 2], [0, 4999, 17, 2500]] = special_floats()  # in different slices
    dense = rng.standard_normal((2, 700)).astype(np.float32)
    wide = np.zeros(900, dtype=np.complex128)
    wide.real[[5, 800]] = [-0.0, 3.0]  # 16-byte items: zero means all 16 bytes zero
    # At exactly half full, 8 bytes per stored value cost as much as dense: dense wins.
    half = np.where(np.arange(1000) % 2 == 0, 1.0, 0.0).astype(np.float32)
    cases = {"sparse": sparse, "dense": dense, "wide": wide, "half": half,
             "empty": np.zeros((0, 3), np.float32), "scalar": np.array(-0.0)}  # fmt: skip
    kinds = {"sparse": Sparse, "wide": Sparse, "dense": np.ndarray, "half": np.ndarray,
             "empty": np.ndarray, "scalar": np.ndarray}  # fmt: skip
    for name, array in cases.items():
        for step in (1, 7, 1000, 1 << 20):
            taken = capture(array, step=step)
            assert isinstance(taken, kinds[name]), (name, step)
            if isinstance(taken, np.ndarray):
                assert same_bits(taken, array) and not np.shares_memory(taken, array)
            # Stored exactly as the array itself would be: the same file bytes.
            assert encode({"a": taken}) == encode({"a": array}), (name, step)
            assert same_bits(decode(encode({"a": taken}))["a"], array), (name, step)
    taken = capture(sparse, step=1000)
    assert isinstance(taken, Sparse)
    assert taken.where.tolist() == [0, 9999, 10017, 12500] and taken.index_dtype == "<u4"
    assert np.shares_memory(capture(dense, copy=False), dense)


def test_store_streams_large_arrays_into_the_encoded_bytes(tmp_path: Path) -> None:
    rng = np.random.default_rng(12)
    dense = rng.standard_normal(3 << 20).astype(np.float32)  # 12 MiB: written in slices
    sparse = np.zeros(1 << 22, dtype=np.float32)
    sparse[rng.integers(0, 1 << 22, 5000)] = 1.5
    state = {"learner": {"weights": capture(dense, step=1 << 18), "accum": capture(sparse)}}
    info = SnapshotStore(tmp_path).write(state, offset=9, time=2.0)
    data = info.path.read_bytes()
    plain = {"learner": {"weights": dense, "accum": sparse}}
    assert data == encode(plain, meta={"generation": 1, "offset": 9, "time": 2.0})
    assert info.bytes == len(data)
    back = SnapshotStore(tmp_path).load(1)["learner"]
    assert same_bits(back["weights"], dense) and same_bits(back["accum"], sparse)


def test_every_flipped_byte_of_a_captured_snapshot_is_rejected(tmp_path: Path) -> None:
    sparse = np.zeros(4000, dtype=np.float32)
    sparse[[1, 2000, 3999]] = special_floats()[:3]
    state = {"w": capture(sparse, step=512), "u": capture(np.arange(40, dtype=np.float32))}
    data = SnapshotStore(tmp_path).write(state, offset=1, time=1.0).path.read_bytes()
    for position in range(len(data)):
        damaged = bytearray(data)
        damaged[position] ^= 0x01
        with pytest.raises(CorruptSnapshot):
            decode(bytes(damaged))


def test_unsupported_values_are_refused() -> None:
    with pytest.raises(TypeError, match="cannot hold a object"):
        encode({"x": object()})
    with pytest.raises(TypeError, match="dtype object"):
        encode({"x": np.array([1, "a"], dtype=object)})
    with pytest.raises(TypeError, match="must be a dict"):
        encode([1, 2])  # type: ignore[arg-type]


def test_every_flipped_byte_and_every_truncation_is_rejected() -> None:
    data = encode(sample_state(np.random.default_rng(3)), meta={"generation": 1})
    for position in range(len(data)):
        damaged = bytearray(data)
        damaged[position] ^= 0x10
        with pytest.raises(CorruptSnapshot):
            decode(bytes(damaged))
    for length in range(len(data)):
        with pytest.raises(CorruptSnapshot):
            decode(data[:length])


def _resealed(body: bytes) -> bytes:
    return body + hashlib.sha256(body).digest()


def test_clear_messages_for_foreign_or_newer_files() -> None:
    data = encode({"a": 1})
    with pytest.raises(CorruptSnapshot, match="SHA-256"):
        decode(data[:-1] + bytes([data[-1] ^ 1]))
    with pytest.raises(CorruptSnapshot, match="bad magic"):
        decode(_resealed(b"PK\x03\x04" + data[4:-32]))
    newer = bytearray(data[:-32])
    newer[8:10] = struct.pack("<H", 2)
    with pytest.raises(CorruptSnapshot, match="format version 2; this build reads 1"):
        decode(_resealed(bytes(newer)))
    garbage = bytearray(data[:-32])
    garbage[read_header(data)[1] + 8] = 0xC1  # the tree's first byte; never used by msgpack
    with pytest.raises(CorruptSnapshot, match="not valid msgpack"):
        decode(_resealed(bytes(garbage)))


# -- the store ----------------------------------------------------------------------------


def test_generations_prune_and_list_newest_first(tmp_path: Path) -> None:
    store = SnapshotStore(tmp_path / "snaps", keep=3)
    assert store.list() == [] and store.load_newest() is None and store.oldest_offset() is None
    rng = np.random.default_rng(5)
    states = []
    for n in range(1, 8):
        state = sample_state(rng)
        states.append(state)
        info = store.write(state, offset=n * 100, time=1000.0 + n)
        assert (info.generation, info.offset, info.time) == (n, n * 100, 1000.0 + n)
        assert info.bytes == info.path.stat().st_size
    listing = store.list()
    assert [i.generation for i in listing] == [7, 6, 5]
    assert [i.offset for i in listing] == [700, 600, 500]
    assert sorted(os.listdir(tmp_path / "snaps")) == [
        "000000000005.snap",
        "000000000006.snap",
        "000000000007.snap",
    ]
    assert store.oldest_offset() == 500
    check_state(store.load(6), states[5])
    with pytest.raises(NotFound, match="generation 2"):
        store.load(2)
    # A new store over the same directory keeps counting from the files.
    assert SnapshotStore(tmp_path / "snaps").write({}, offset=800, time=0.0).generation == 8


def test_listing_reads_headers_not_weights(tmp_path: Path) -> None:
    store = SnapshotStore(tmp_path, keep=5)
    weights = np.random.default_rng(2).standard_normal(1 << 18).astype(np.float32)
    info = store.write({"w": weights}, offset=42, time=5.0)
    damaged = bytearray(info.path.read_bytes())
    damaged[len(damaged) // 2] ^= 0xFF  # deep inside the weights
    info.path.write_bytes(bytes(damaged))
    assert store.list() == [info]  # the header alone answers
    with pytest.raises(CorruptSnapshot, match="SHA-256"):
        store.load(info.generation)


def test_load_newest_falls_back_and_says_why(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    store = SnapshotStore(tmp_path, keep=5)
    rng = np.random.default_rng(9)
    states = [sample_state(rng) for _ in range(3)]
    infos = [store.write(s, offset=10 * (k + 1), time=float(k)) for k, s in enumerate(states)]
    newest = bytearray(infos[2].path.read_bytes())
    newest[-40] ^= 0x01
    infos[2].path.write_bytes(bytes(newest))
    infos[1].path.write_bytes(infos[1].path.read_bytes()[:9])  # header gone too
    with caplog.at_level(logging.WARNING, logger="thresher.snapshots"):
        loaded = store.load_newest()
    assert loaded is not None
    state, info, skipped = loaded
    check_state(state, states[0])
    assert info == infos[0]
    assert [(s.generation, s.offset) for s, _ in skipped] == [(3, 30), (2, -1)]
    assert "SHA-256" in skipped[0][1] and "truncated" in skipped[1][1]
    assert "000000000003.snap skipped" in caplog.text
    assert "000000000002.snap skipped" in caplog.text
    infos[0].path.write_bytes(b"")
    assert store.load_newest() is None


def test_crash_mid_write_keeps_the_last_generation(tmp_path: Path) -> None:
    store = SnapshotStore(tmp_path, keep=5)
    first = store.write({"w": np.ones(10, dtype=np.float32)}, offset=1, time=1.0)
    # A real writer process, killed for real while its temp file is being written.
    writer = subprocess.Popen(
        [sys.executable, "-c",
         "import sys, numpy as np; from thresher.snapshots import SnapshotStore\n"
         "s = SnapshotStore(sys.argv[1])\n"
         "while True: s.write({'w': np.ones(1 << 24, np.float32)}, offset=2, time=2.0)",
         str(tmp_path)],
    )  # fmt: skip
    try:
        deadline = time.monotonic() + 30
        while not any(n.endswith(f".tmp-{writer.pid}") for n in os.listdir(tmp_path)):
            assert time.monotonic() < deadline and writer.poll() is None
            time.sleep(0.001)
        writer.kill()
        writer.wait(timeout=30)
    finally:
        if writer.poll() is None:
            writer.kill()
            writer.wait(timeout=30)
    names = os.listdir(tmp_path)
    assert any(".tmp-" in n for n in names)
    loaded = store.load_newest()
    assert loaded is not None and loaded[2] == []
    assert loaded[1].generation >= first.generation
    after = store.write({"w": np.zeros(3)}, offset=3, time=3.0)
    assert not any(".tmp-" in n for n in os.listdir(tmp_path))  # the dead writer's temp
    assert store.list()[0] == after


def test_full_disk_keeps_earlier_generations(tmp_path: Path) -> None:
    with mounted_tmpfs(tmp_path / "disk", "1m") as disk:
        store = SnapshotStore(disk / "snaps", keep=5)
        kept = store.write({"w": np.arange(1000, dtype=np.float64)}, offset=7, time=1.0)
        big = np.random.default_rng(4).standard_normal(1 << 18)  # 2 MiB, more than the disk
        with pytest.raises(Unavailable, match="No space left on device; the earlier"):
            store.write({"w": big}, offset=8, time=2.0)
        assert os.listdir(disk / "snaps") == [kept.path.name]  # no temp file left
        loaded = store.load_newest()
        assert loaded is not None and loaded[1] == kept
        assert same_bits(loaded[0]["w"], np.arange(1000, dtype=np.float64))
