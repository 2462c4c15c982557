"""The label record, the unit of the label log, and its msgpack encoding.

A record is ``{"id": str | None, "label": str, "fields": dict, "source": str,
"served": str | None, "time": float}``. Keys beyond these six are carried through untouched so
a later format can add some without breaking older readers; the six are always checked.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from itertools import accumulate
from typing import Any

import msgpack

REQUIRED = ("id", "label", "fields", "source", "served", "time")


class CorruptRecord(ValueError):
    """A log payload is not a well-formed label record."""


def encode(record: dict[str, Any]) -> bytes:
    """Check a record's shape and pack it; ``time`` is always stored as a float."""
    _check(record)
    packed = dict(record)
    packed["time"] = float(record["time"])
    try:
        data: bytes = msgpack.packb(packed, use_bin_type=True, strict_types=True)
    except (TypeError, ValueError, OverflowError) as exc:
        raise CorruptRecord(f"label record cannot be encoded: {exc}") from exc
    return data


def decode(data: bytes) -> dict[str, Any]:
    """Unpack a record and check its shape; raises :class:`CorruptRecord`."""
    try:
        record = msgpack.unpackb(data, raw=False, strict_map_key=True, use_list=True)
    except (msgpack.UnpackException, ValueError, TypeError) as exc:
        raise CorruptRecord(f"label record is not valid msgpack: {exc}") from exc
    _check(record)
    return record  # type: ignore[no-any-return]


def decode_many(payloads: Sequence[bytes]) -> tuple[list[dict[str, Any]], CorruptRecord | None]:
    """Decode payloads as :func:`decode` would each: the records before the first corrupt
    payload, and that payload's error (None when every payload is a record).

    The payloads are unpacked as one stream. Past the first payload that is not exactly one
    plainly shaped record it falls back to :func:`decode` on each, which names the fault.
    """
    blob = b"".join(payloads)
    unpacker = msgpack.Unpacker(
        raw=False, strict_map_key=True, use_list=True, max_buffer_size=max(1, len(blob))
    )
    unpacker.feed(blob)
    tell, recs = unpacker.tell, []
    append = recs.append
    try:
        # An object read past its payload's end shows in the stream position (msgpack holds
        # no state between objects, so one that ends exactly there decodes alone the same).
        for end, record in zip(accumulate(map(len, payloads)), unpacker, strict=False):
            if tell() != end or type(record) is not dict or not _well_formed(record):
                break
            append(record)
    except (msgpack.UnpackException, ValueError, TypeError):
        pass
    for payload in payloads[len(recs) :]:
        try:
            recs.append(decode(payload))
        except CorruptRecord as exc:
            return recs, exc
    return recs, None


def _check(record: Any) -> None:
    if type(record) is dict and _well_formed(record):
        return
    if not isinstance(record, dict):
        raise CorruptRecord(f"label record must be a map, got {type(record).__name__}")
    missing = [key for key in REQUIRED if key not in record]
    if missing:
        raise CorruptRecord(f"label record lacks {', '.join(missing)}")
    for key in ("id", "served"):
        if record[key] is not None and not isinstance(record[key], str):
            raise CorruptRecord(f"label record {key} must be a string or null")
    for key in ("label", "source"):
        if not isinstance(record[key], str):
            raise CorruptRecord(f"label record {key} must be a string")
    fields = record["fields"]
    if not isinstance(fields, dict) or not all(map(str.__instancecheck__, fields)):
        raise CorruptRecord("label record fields must be a map with string keys")
    stamp = record["time"]
    if isinstance(stamp, bool) or not isinstance(stamp, int | float) or not math.isfinite(stamp):
        raise CorruptRecord("label record time must be a finite number of seconds")


def _well_formed(record: dict[str, Any]) -> bool:
    """The plain shape every record this service writes has, checked in one pass."""
    try:
        event_id, label, fields = record["id"], record["label"], record["fields"]
        source, served, stamp = record["source"], record["served"], record["time"]
    except KeyError:
        return False
    return (
        (event_id is None or type(event_id) is str)
        and type(label) is str
        and type(source) is str
        and (served is None or type(served) is str)
        and type(stamp) is float
        and math.isfinite(stamp)
        and type(fields) is dict
        and all(map(str.__instancecheck__, fields))
    )
