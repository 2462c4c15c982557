"""The label record, the unit of the label log, and its msgpack encoding (the one owner of it).

A record is ``{"id": str | None, "label": str, "fields": dict, "source": str,
"served": str | None, "time": float}``. Payloads are stored in one of two versions:

Version 2, written by :func:`encode` and :func:`encode_many`: a msgpack array ::

    [2, id, label, source, served, time, fields, key, indices, values]

``id`` and ``served`` are str or nil, ``label`` and ``source`` str, ``time`` a float64 of
seconds. ``fields`` is a bin holding the fields map packed on its own, so that a reader with the
row decodes it only when it needs the fields (explaining a mistake, featurizing again).
``indices`` and ``values`` are bins holding the row the featurizer made at label time: nnz
little-endian uint32 indices (strictly increasing, each < 2**bits) and nnz little-endian
float32 values (finite, nonzero). ``key`` is a bin, the :func:`fingerprint` of that featurizer
(bits, seed, signed, feature spec, token rules); empty, with empty rows, when none was made.
Elements past the tenth are ignored, so that a later version can append some.

Version 1, still read: a msgpack map of the six keys; keys beyond them are carried through.

Decoded, a version 2 record is a dict with the five scalar keys plus ``packed`` (the fields
bin), ``key`` and ``row``. :func:`decode_many` given a model's key and bits checks the row of
each record made under that key (one the featurizer cannot have made is a corrupt record),
keeps it as ``row`` (index bytes, value bytes) and leaves the fields packed; :func:`fields`
unpacks them on first use. Every other record gets ``row`` None and its fields decoded, to be
featurized again. A label request's records hold their fields as ``packed`` too, from the moment
they are packed for the log.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Callable, Mapping, Sequence
from itertools import accumulate
from typing import Any

import msgpack
import numpy as np

from .features import TOKEN_RULES

try:  # the compiled fast path of `encode_many` (_records.c); the Python below is its reference
    from . import _records
except ImportError:  # pragma: no cover - a build without the C extension
    _records = None  # type: ignore[assignment]

VERSION = 2
REQUIRED = ("id", "label", "fields", "source", "served", "time")
KEY_BYTES = 8
INDEX, VALUE = np.dtype("<u4"), np.dtype("<f4")  # a stored row's element types


class CorruptRecord(ValueError):
    """A log payload is not a well-formed label record."""


def fingerprint(spec: Mapping[str, Any], *, bits: int, seed: int, signed: bool) -> bytes:
    """The key under which a featurizer's rows are stored: equal keys make equal rows."""
    made_by = {"bits": bits, "seed": seed, "signed": signed, "spec": spec, "rules": TOKEN_RULES}
    text = json.dumps(made_by, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).digest()[:KEY_BYTES]


UNPACKABLE = (TypeError, ValueError, OverflowError)  # what packing fields can raise


def raw_fields_packer() -> Callable[[Mapping[str, Any]], bytes]:
    """:func:`fields_packer` without its error translation: it raises one of `UNPACKABLE`.

    For a caller that packs in its own loop and reports the failure itself.
    """
    return msgpack.Packer(use_bin_type=True, strict_types=True).pack  # type: ignore[no-any-return]


def fields_packer() -> Callable[[Mapping[str, Any]], bytes]:
    """A function packing fields maps as records store them; raises :class:`CorruptRecord`.

    Make one per run of records: it reuses one packer (creating one costs as much as a pack).
    """
    pack = raw_fields_packer()

    def packed(fields: Mapping[str, Any]) -> bytes:
        try:
            data: bytes = pack(fields)
        except UNPACKABLE as exc:
            raise CorruptRecord(f"label record fields cannot be encoded: {exc}") from exc
        return data

    return packed


def encode(
    record: dict[str, Any], row: tuple[np.ndarray, np.ndarray] | None = None, key: bytes = b""
) -> bytes:
    """Check a record's shape and pack it, with the row (indices, values) made under ``key``."""
    _check(record)
    packed = {**record, "packed": fields_packer()(record["fields"])}
    indices, values = row if row is not None else (np.zeros(0, np.int64), np.zeros(0, np.float32))
    indptr = np.array([0, len(indices)], dtype=np.int64)
    return encode_many([packed], key if row is not None else b"", (indptr, indices, values), [0])[0]


def encode_many(
    recs: Sequence[dict[str, Any]],
    key: bytes,
    batch: tuple[np.ndarray, np.ndarray, np.ndarray],
    picks: Sequence[int],
) -> list[bytes]:
    """Payloads of records whose fields :func:`fields_packer` packed already (as ``packed``),
    ``recs[k]`` with row ``picks[k]`` of the CSR ``batch`` (indptr, indices, values) that the
    featurizer with fingerprint ``key`` made."""
    if _records is not None:
        made = _records.encode(
            recs if type(recs) is list else list(recs), key, *batch,
            picks if type(picks) is list else list(picks),
        )  # fmt: skip
        if made is not None:
            return made  # type: ignore[no-any-return]
    return encode_many_reference(recs, key, batch, picks)


def encode_many_reference(
    recs: Sequence[dict[str, Any]],
    key: bytes,
    batch: tuple[np.ndarray, np.ndarray, np.ndarray],
    picks: Sequence[int],
) -> list[bytes]:
    """:func:`encode_many` in Python and numpy, the reference of its compiled path: that path
    hands over every call it does not take, and this encodes it or raises the exact error."""
    indptr, indices, values = batch
    if indices.size and not 0 <= int(indices.min()) <= int(indices.max()) < 1 << 32:
        raise ValueError("row indices must be below 2**32 to be stored")
    index_bytes, value_bytes = indices.astype(INDEX).tobytes(), values.astype(VALUE).tobytes()
    ptr = (indptr * 4).tolist()
    pack = msgpack.Packer(use_bin_type=True).pack
    out = []
    for record, p in zip(recs, picks, strict=True):
        if not (_well_formed(record, fields=False) and type(record.get("packed")) is bytes):
            _check({**record, "fields": {}})  # an integer time passes, as float() stores it
            if type(record.get("packed")) is not bytes:
                raise CorruptRecord("label record fields must be packed before it is encoded")
        a, b = ptr[p], ptr[p + 1]
        out.append(_pack_header(pack, record, key, index_bytes[a:b], value_bytes[a:b]))
    return out


def _pack_header(
    pack: Callable[[Any], bytes],
    record: dict[str, Any],
    key: bytes,
    index_bytes: bytes,
    value_bytes: bytes,
) -> bytes:
    return pack(
        [
            VERSION,
            record["id"],
            record["label"],
            record["source"],
            record["served"],
            float(record["time"]),
            record["packed"],
            key,
            index_bytes,
            value_bytes,
        ]
    )


def fields(record: dict[str, Any]) -> dict[str, Any]:
    """The record's fields, unpacked (and kept) on first use; raises :class:`CorruptRecord`."""
    found = record.get("fields")
    if found is None:
        found = _unpack_fields(record["packed"])
        record["fields"] = found
    return found  # type: ignore[no-any-return]


def row(record: dict[str, Any]) -> tuple[np.ndarray, np.ndarray]:
    """The checked stored row of a record (see :func:`decode_many`): int64 indices, float32."""
    index_bytes, value_bytes = record["row"]
    return (
        np.frombuffer(index_bytes, dtype=INDEX).astype(np.int64),
        np.frombuffer(value_bytes, dtype=VALUE).astype(np.float32),
    )


def stack_rows(rows: Sequence[tuple[bytes, bytes]]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Checked stored rows (records' ``row``) as one CSR batch (indptr, indices, values)."""
    indptr = np.zeros(len(rows) + 1, dtype=np.int64)
    indptr[1:] = list(accumulate(len(r[0]) >> 2 for r in rows))
    indices = np.frombuffer(b"".join(r[0] for r in rows), dtype=INDEX).astype(np.int64)
    values = np.frombuffer(b"".join(r[1] for r in rows), dtype=VALUE).astype(np.float32)
    return indptr, indices, values


def decode(data: bytes, key: bytes = b"", bits: int = 0) -> dict[str, Any]:
    """Unpack one record as :func:`decode_many` would; raises :class:`CorruptRecord`."""
    recs, error = decode_many([data], key, bits)
    if error is not None:
        raise error
    return recs[0]


def decode_many(
    payloads: Sequence[bytes], key: bytes = b"", bits: int = 0
) -> tuple[list[dict[str, Any]], CorruptRecord | None]:
    """Decode payloads as :func:`decode` would each: the records before the first corrupt
    payload, and that payload's error (None when every payload is a record).

    With a model's ``key`` and ``bits``, a version 2 record made under ``key`` keeps its row,
    checked, and its fields packed (see the module docstring); its fields are checked when
    first unpacked. The payloads are unpacked as one stream. Past the first payload that is
    not exactly one plainly shaped record it falls back to :func:`decode` on each, which
    names the fault.
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
        for end, obj in zip(accumulate(map(len, payloads)), unpacker, strict=False):
            if tell() != end:
                break
            if type(obj) is list:
                if len(obj) < 10 or obj[0] != VERSION:
                    break
                (_, event_id, label, source, served, stamp, packed, made_by, ib, vb, *_) = obj
                if not (
                    _plain(event_id, label, source, served, stamp)
                    and type(packed) is bytes
                    and type(made_by) is bytes
                    and type(ib) is bytes
                    and type(vb) is bytes
                    and len(ib) == len(vb)
                    and not len(ib) & 3
                ):
                    break
                append(
                    {"id": event_id, "label": label, "source": source, "served": served,
                     "time": stamp, "packed": packed, "key": made_by, "row": (ib, vb)}
                )  # fmt: skip
            elif type(obj) is dict and _well_formed(obj):
                append(obj)
            else:
                break
    except (msgpack.UnpackException, ValueError, TypeError):
        pass
    for payload in payloads[len(recs) :]:
        try:
            recs.append(_decode_one(payload))
        except CorruptRecord as exc:
            return _rows_checked(recs, key, bits, exc)
    return _rows_checked(recs, key, bits, None)


def _rows_checked(
    recs: list[dict[str, Any]], key: bytes, bits: int, error: CorruptRecord | None
) -> tuple[list[dict[str, Any]], CorruptRecord | None]:
    """Keep the rows made under ``key`` (cut the run at the first one that fails its check);
    drop every other row and unpack those records' fields."""
    mine = [k for k, r in enumerate(recs) if r.get("key") == key] if key else []
    bad = _first_bad_row([recs[k]["row"] for k in mine], bits) if mine else None
    if bad is not None:
        del recs[mine[bad] :]
        error = CorruptRecord(
            f"label record row is not one the featurizer makes (indices below 2**{bits}, "
            "strictly increasing; values finite and nonzero)"
        )
    if len(mine) == len(recs):
        return recs, error
    kept = set(mine)
    for k, record in enumerate(recs):
        if k in kept or "row" not in record:
            continue
        record["row"] = None
        if "fields" not in record:
            try:
                record["fields"] = _unpack_fields(record["packed"])
            except CorruptRecord as exc:
                del recs[k:]
                return recs, exc
    return recs, error


def _first_bad_row(rows: list[tuple[bytes, bytes]], bits: int) -> int | None:
    """The position of the first row the featurizer cannot have made, or None."""
    indices = np.frombuffer(b"".join(r[0] for r in rows), dtype=INDEX)
    values = np.frombuffer(b"".join(r[1] for r in rows), dtype=VALUE)
    ends = np.fromiter(accumulate(len(r[0]) >> 2 for r in rows), dtype=np.int64, count=len(rows))
    bad = (indices >> np.uint32(bits)) != 0
    bad |= ~np.isfinite(values)
    bad |= values == 0
    rising = np.ones(indices.size, dtype=bool)
    rising[1:] = indices[1:] > indices[:-1]
    starts = ends[:-1][ends[:-1] < indices.size]  # each row but the first starts afresh
    rising[starts] = True
    bad |= ~rising
    if not bad.any():
        return None
    return int(np.searchsorted(ends, int(np.argmax(bad)), side="right"))


def _decode_one(data: bytes) -> dict[str, Any]:
    """One payload's record, every check made one by one to name the fault."""
    try:
        obj = msgpack.unpackb(data, raw=False, strict_map_key=True, use_list=True)
    except (msgpack.UnpackException, ValueError, TypeError) as exc:
        raise CorruptRecord(f"label record is not valid msgpack: {exc}") from exc
    if type(obj) is list:
        return _from_array(obj)
    _check(obj)
    return obj  # type: ignore[no-any-return]


def _unpack_fields(packed: bytes) -> dict[str, Any]:
    try:
        found = msgpack.unpackb(packed, raw=False, strict_map_key=True, use_list=True)
    except (msgpack.UnpackException, ValueError, TypeError) as exc:
        raise CorruptRecord(f"label record fields are not valid msgpack: {exc}") from exc
    if type(found) is not dict or not all(map(str.__instancecheck__, found)):
        raise CorruptRecord("label record fields must be a map with string keys")
    return found


def _from_array(obj: list[Any]) -> dict[str, Any]:
    """A version 2 record from its array, every element checked; raises CorruptRecord."""
    if len(obj) < 10 or obj[0] != VERSION:
        raise CorruptRecord(
            f"label record must be a map or a version {VERSION} array of 10 elements"
        )
    _, event_id, label, source, served, stamp, packed, made_by, ib, vb, *_ = obj
    record = {"id": event_id, "label": label, "fields": {}, "source": source,
              "served": served, "time": stamp}  # fmt: skip
    _check(record)
    if type(stamp) is not float:
        raise CorruptRecord("label record time must be a float64")
    for name, value in (("fields", packed), ("key", made_by), ("indices", ib), ("values", vb)):
        if type(value) is not bytes:
            raise CorruptRecord(f"label record {name} must be bin")
    if len(ib) != len(vb) or len(ib) % 4:
        raise CorruptRecord("label record row must hold as many 4-byte indices as values")
    del record["fields"]
    record.update(packed=packed, key=made_by, row=(ib, vb))
    return record


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
    found = record["fields"]
    if not isinstance(found, dict) or not all(map(str.__instancecheck__, found)):
        raise CorruptRecord("label record fields must be a map with string keys")
    stamp = record["time"]
    if isinstance(stamp, bool) or not isinstance(stamp, int | float) or not math.isfinite(stamp):
        raise CorruptRecord("label record time must be a finite number of seconds")


def _well_formed(record: dict[str, Any], *, fields: bool = True) -> bool:
    """The plain shape every record this service writes has, checked in one pass."""
    try:
        event_id, label = record["id"], record["label"]
        source, served, stamp = record["source"], record["served"], record["time"]
        found = record["fields"] if fields else None
    except KeyError:
        return False
    return _plain(event_id, label, source, served, stamp) and (
        not fields or (type(found) is dict and all(map(str.__instancecheck__, found)))
    )


def _plain(event_id: Any, label: Any, source: Any, served: Any, stamp: Any) -> bool:
    """Whether a record's scalars have the exact types this service writes."""
    return (
        (event_id is None or type(event_id) is str)
        and type(label) is str
        and type(source) is str
        and (served is None or type(served) is str)
        and type(stamp) is float
        and math.isfinite(stamp)
    )
