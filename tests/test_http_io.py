"""Request bodies and answers: the fast JSON codec must read and write exactly what `json` does."""

from __future__ import annotations

import json
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from thresher.http_io import decode_json, encode_json

# Unbounded integers (beyond 64 bits too), every finite float, text with any code point.
_scalars = (
    st.none()
    | st.booleans()
    | st.integers()
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(st.characters(codec=None), max_size=20)
)
_values = st.recursive(
    _scalars,
    lambda inner: (
        st.lists(inner, max_size=5) | st.dictionaries(st.text(max_size=8), inner, max_size=5)
    ),
    max_leaves=30,
)


def _same(a: Any, b: Any) -> bool:
    """Equal and of the same types all the way down (1 is not 1.0, -0.0 is not 0.0)."""
    if type(a) is not type(b):
        return False
    if isinstance(a, dict):
        return list(a) == list(b) and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    if isinstance(a, float):
        return repr(a) == repr(b)
    return bool(a == b)


@settings(max_examples=300, deadline=None)
@given(_values, st.booleans())
def test_decode_reads_what_json_reads(value: Any, ascii_only: bool) -> None:
    try:
        raw = json.dumps(value, ensure_ascii=ascii_only).encode()
    except UnicodeEncodeError:  # a lone surrogate has no UTF-8 form; the escaped case covers it
        raw = json.dumps(value).encode()
    assert _same(decode_json(raw), json.loads(raw))


@pytest.mark.parametrize(
    "raw",
    [
        b'{"n": 123456789012345678901234567890}',  # beyond 64 bits: stays an exact int
        b'{"n": -9223372036854775809}',  # one below the int64 range
        b'{"n": 18446744073709551615}',  # the largest uint64
        b'{"s": "\\ud800 alone"}',  # a lone surrogate escape, which json accepts
        b'\xef\xbb\xbf{"bom": true}',  # a UTF-8 byte order mark, which json skips
        b"1e400",  # json reads an overflowing literal as infinity
        b'{"a": 1, "a": 2}',  # the last duplicate wins
    ],
)
def test_decode_matches_json_where_codecs_differ(raw: bytes) -> None:
    assert _same(decode_json(raw), json.loads(raw))


@pytest.mark.parametrize("raw", [b"NaN", b'{"x": -Infinity}', b"{", b"[1,]", b"\xff"])
def test_decode_refuses_what_json_refuses(raw: bytes) -> None:
    with pytest.raises(ValueError):
        decode_json(raw)


def test_decode_refuses_deep_nesting_with_a_value_error() -> None:
    # json.loads raises RecursionError here, which would have been an internal error.
    with pytest.raises(ValueError, match=r"nested too deeply"):
        decode_json(b"[" * 200_000 + b"]" * 200_000)


@settings(max_examples=300, deadline=None)
@given(_values)
def test_encode_writes_what_json_reads_back(value: Any) -> None:
    out = encode_json({"results": [value]})
    assert _same(json.loads(out), {"results": [value]})


def test_encode_writes_keys_json_would_write() -> None:
    assert encode_json({"a": [1, 2.5], "b": None}) == b'{"a":[1,2.5],"b":null}'  # compact
    assert json.loads(encode_json({1: "a", "b": [1.5, None, True]})) == {
        "1": "a",
        "b": [1.5, None, True],
    }
    assert json.loads(encode_json({"big": 2**80})) == {"big": 2**80}
