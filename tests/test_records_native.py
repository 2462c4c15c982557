"""The compiled record encoder and framer (thresher._records) against the Python they must equal.

`records.encode_many_reference` packs with msgpack-python and numpy and
`segments.frame_records_reference` frames with zlib; the compiled paths must give the same
bytes, and hand back (None) whatever they do not take, so that `encode_many` and
`frame_records` answer or raise exactly as the reference does.
"""

from __future__ import annotations

import os
import re
import struct
import zlib
from typing import Any

import msgpack
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from thresher import records, segments
from thresher.demo_traffic import DEMO_MODEL, DEMO_SPEC, ListingTraffic
from thresher.features import FeatureSpec, Featurizer

if records._records is None:  # a source tree that was never built
    if os.environ.get("CI"):
        pytest.fail("thresher._records is not built; pip install the package", pytrace=False)
    pytest.skip("thresher._records is not built", allow_module_level=True)

from thresher._records import encode, frame

KEY = b"\x01\x02\x03\x04\x05\x06\x07\x08"
BITS = int(DEMO_MODEL["bits"])


def _demo(n: int, seed: int) -> tuple[list[dict[str, Any]], Any]:
    """``n`` demo label records (fields packed) and their featurized batch."""
    events = ListingTraffic(seed=seed, shift_at=max(1, n // 2)).batch(n)
    featurizer = Featurizer(FeatureSpec.from_json(DEMO_SPEC), BITS, int(DEMO_MODEL["seed"]), True)
    batch = featurizer.transform_batch([fields for _, fields, _ in events])
    pack = records.fields_packer()
    recs = [
        {"id": event_id if k % 3 else None, "label": label, "source": "queue",
         "served": None if k % 2 else "fine", "time": 1.7e9 + k / 7, "packed": pack(fields)}
        for k, (event_id, fields, label) in enumerate(events)
    ]  # fmt: skip
    return recs, batch


def _csr(rows: list[list[int]]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    indptr = np.zeros(len(rows) + 1, np.int64)
    indptr[1:] = np.cumsum([len(r) for r in rows])
    indices = np.array([i for r in rows for i in r], np.int64)
    values = np.arange(1, indices.size + 1, dtype=np.float32) / 3
    return indptr, indices, values


def _same(recs: list[dict[str, Any]], key: bytes, batch: Any, picks: list[int]) -> list[bytes]:
    made = encode(recs, key, *batch, picks)
    assert made is not None
    assert made == records.encode_many_reference(recs, key, batch, picks)
    return made  # type: ignore[no-any-return]


def test_demo_records_encode_byte_for_byte_and_decode_back() -> None:
    recs, batch = _demo(400, seed=5)
    picks = list(range(len(recs)))
    payloads = _same(recs, KEY, batch, picks)
    got, error = records.decode_many(payloads, KEY, BITS)
    assert error is None
    for k, (record, back) in enumerate(zip(recs, got, strict=True)):
        for name in ("id", "label", "source", "served", "time", "packed"):
            assert back[name] == record[name]
        a, b = int(batch.indptr[k]), int(batch.indptr[k + 1])
        indices, values = records.row(back)
        assert np.array_equal(indices, batch.indices[a:b])
        assert np.array_equal(values, batch.values[a:b])
    # Some rows of the batch, out of order and repeated (a request that held repeats).
    picks = [7, 3, 3, 399, 0]
    _same([recs[p] for p in picks], KEY, batch, picks)
    _same(recs[:3], b"", batch, [0, 1, 2])  # no key


@pytest.mark.parametrize("size", [0, 1, 31, 32, 255, 256, 65535, 65536, 70000])
def test_every_header_width(size: int) -> None:
    # msgpack's str and bin lengths switch header width at 32, 256 and 65536 bytes.
    text = "x" * size
    record = {"id": text or None, "label": text, "source": text, "served": text or None,
              "time": -0.0, "packed": b"\x80" + b"y" * size}  # fmt: skip
    _same([record], b"k" * size, _csr([[0, 2**32 - 1]]), [0])
    _same([record], KEY, _csr([list(range(size // 4))]), [0])


def test_empty_rows_and_an_empty_batch() -> None:
    record = {"id": "a", "label": "b", "source": "c", "served": None, "time": 1.5,
              "packed": b"\x80"}  # fmt: skip
    _same([record, record], KEY, _csr([[], [5], []]), [0, 2])
    assert encode([], KEY, *_csr([]), []) == []


TEXT = st.text(max_size=40)  # lone surrogates included: those go to the reference


@settings(max_examples=300, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.none() | TEXT, TEXT, TEXT, st.none() | TEXT,
            st.floats(allow_nan=False, allow_infinity=False), st.binary(max_size=300),
        ),
        min_size=1, max_size=8,
    ),
    st.randoms(use_true_random=False),
)  # fmt: skip
def test_generated_records_encode_as_the_reference(made: list[tuple[Any, ...]], rng: Any) -> None:
    recs = [dict(zip(("id", "label", "source", "served", "time", "packed"), m, strict=True))
            for m in made]  # fmt: skip
    rows = [sorted(rng.sample(range(1 << 20), rng.randint(0, 6))) for _ in recs]
    batch = _csr(rows)
    picks = list(range(len(recs)))
    rng.shuffle(picks)
    got = encode(recs, KEY, *batch, picks)
    if got is None:  # handed back: only for a string that is not UTF-8
        texts = [v for r in recs for v in (r["id"], r["label"], r["source"], r["served"])]
        assert any(_not_utf8(v) for v in texts if v is not None)
        with pytest.raises(UnicodeEncodeError):
            records.encode_many(recs, KEY, batch, picks)
    else:
        assert got == records.encode_many_reference(recs, KEY, batch, picks)


def _not_utf8(text: str) -> bool:
    try:
        text.encode()
    except UnicodeEncodeError:
        return True
    return False


class Text(str):
    pass


GOOD = {"id": "e1", "label": "fine", "source": "s", "served": None, "time": 2.0, "packed": b"\x80"}


@pytest.mark.parametrize(
    "change",
    [
        {"time": 2},  # an integer time: the reference stores float(time)
        {"time": float("nan")},
        {"time": float("inf")},
        {"label": Text("fine")},
        {"id": 7},
        {"served": b"fine"},
        {"id": "\ud800"},  # not UTF-8
        {"packed": bytearray(b"\x80")},
        {"packed": None},
    ],
)
def test_records_it_does_not_take_go_to_the_reference(change: dict[str, Any]) -> None:
    record = {**GOOD, **change}
    batch = _csr([[1, 2]])
    assert encode([record], KEY, *batch, [0]) is None
    try:
        expected: Any = records.encode_many_reference([record], KEY, batch, [0])
    except Exception as exc:  # the same error, whichever it is
        with pytest.raises(type(exc), match=re.escape(str(exc))):
            records.encode_many([record], KEY, batch, [0])
    else:
        assert records.encode_many([record], KEY, batch, [0]) == expected


def test_missing_keys_and_rows_out_of_range_go_to_the_reference() -> None:
    batch = _csr([[1, 2]])
    lacking = {k: v for k, v in GOOD.items() if k != "served"}
    assert encode([lacking], KEY, *batch, [0]) is None
    with pytest.raises(records.CorruptRecord, match="lacks served"):
        records.encode_many([lacking], KEY, batch, [0])
    for picks in ([1], [-1]):
        assert encode([GOOD], KEY, *batch, picks) is None
    wide = (batch[0], np.array([1, 2**32], np.int64), batch[2])
    negative = (batch[0], np.array([-1, 2], np.int64), batch[2])
    for bad in (wide, negative):
        assert encode([GOOD], KEY, *bad, [0]) is None
        with pytest.raises(ValueError, match="below 2\\*\\*32"):
            records.encode_many([GOOD], KEY, bad, [0])
    # Other dtypes and layouts: encoded by the reference, the same bytes.
    other = [
        (batch[0], batch[1].astype(np.int32), batch[2]),
        (batch[0], batch[1], batch[2].astype(np.float64)),
        (batch[0].astype(np.int32), batch[1], batch[2]),
        (batch[0], np.array([1, 9, 2, 9], np.int64)[::2], batch[2]),
    ]
    for arrays in other:
        assert encode([GOOD], KEY, *arrays, [0]) is None
        assert records.encode_many([GOOD], KEY, arrays, [0]) == records.encode_many(
            [GOOD], KEY, batch, [0]
        )
    assert encode((GOOD,), KEY, *batch, [0]) is None  # a tuple: encode_many lists it first
    assert records.encode_many((GOOD,), KEY, batch, (0,)) == _same([GOOD], KEY, batch, [0])


def test_a_version_2_payload_as_the_format_documents_it() -> None:
    # The layout written out by hand from records.py's docstring and the msgpack spec.
    record = {"id": None, "label": "fraud", "source": "q", "served": "fine", "time": 0.5,
              "packed": b"\x81\xa1a\x01"}  # fmt: skip
    (payload,) = _same([record], KEY, _csr([[3, 70000]]), [0])
    expected = (
        b"\x9a\x02\xc0\xa5fraud\xa1q\xa4fine\xcb" + struct.pack(">d", 0.5)
        + b"\xc4\x04\x81\xa1a\x01" + b"\xc4\x08" + KEY
        + b"\xc4\x08" + struct.pack("<II", 3, 70000)
        + b"\xc4\x08" + struct.pack("<ff", 1 / 3, 2 / 3)
    )  # fmt: skip
    assert payload == expected
    assert msgpack.unpackb(payload)[8] == struct.pack("<II", 3, 70000)


def test_frames_as_the_reference() -> None:
    recs, batch = _demo(50, seed=8)
    payloads = [*_same(recs, KEY, batch, list(range(50))), b"\x00", b"z" * 70000]
    framed = frame(payloads, zlib.crc32, segments.MAX_RECORD_BYTES)
    assert framed == segments.frame_records_reference(payloads)
    assert framed == segments.frame_records(payloads)
    first = payloads[0]
    assert framed[:8] == struct.pack("<II", len(first), zlib.crc32(first))
    parsed, end, reason = segments.parse_records(framed, 0, len(payloads), 0, [], 0)
    assert (parsed, end, reason) == (payloads, len(framed), None)
    # The CRC is the one the function handed in answers; its errors come through.
    assert frame([b"ab"], lambda p: 0xDEADBEEF, 16) == b"\x02\0\0\0\xef\xbe\xad\xdeab"
    assert frame([b"ab"], lambda p: 1 << 32, 16) is None
    with pytest.raises(ZeroDivisionError):
        frame([b"ab"], lambda p: 1 // 0, 16)


@pytest.mark.parametrize(
    "payloads", [[], [b""], [b"ok", bytearray(b"no")], [b"ok", "text"], [b"x" * 17]]
)
def test_payloads_it_does_not_take_go_to_the_reference(payloads: list[Any]) -> None:
    assert frame(payloads, zlib.crc32, 16) is None
    if payloads == [b"x" * 17]:
        return  # over the limit passed here; the real limit is 16 MiB
    with pytest.raises(ValueError):
        segments.frame_records(payloads)
