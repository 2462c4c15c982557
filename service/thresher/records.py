"""The label record, the unit of the label log, and its msgpack encoding.

A record is ``{"id": str | None, "label": str, "fields": dict, "source": str,
"served": str | None, "time": float}``. Keys beyond these six are carried through untouched so
a later format can add some without breaking older readers; the six are always checked.
"""

from __future__ import annotations

import math
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
