"""The snapshot file format: a state dict as msgpack plus aligned array bytes, checksummed.

PURE, bytes in and bytes out: :func:`encode` makes a file's bytes from a state dict;
:func:`read_header` and :func:`decode_file` read them back and raise :class:`CorruptSnapshot`
on anything that fails a check. :mod:`thresher.snapshots` keeps these files as numbered
generations and re-exports this API. File layout (little-endian)::

    b"THRSNAP\\0" | u16 format version | u32 header length | header (msgpack map)
    | u32 CRC-32 of the header | u64 tree length | tree (msgpack of the state)
    | array bytes, each 64-byte aligned | SHA-256 of everything before it

The header holds what a listing needs (generation, log offset, time), so listing reads a few
hundred bytes and never the weights. numpy arrays anywhere in the state are stored with dtype
and shape, dense or as (flat index, value) pairs, whichever is smaller; a value counts as zero
only when all its bits are zero, so -0.0 and NaN payloads survive exactly. Array bytes live
after the tree rather than inside it, so writing and loading large weights copies them once.

:func:`capture` takes the copy a snapshot needs of a live array in slices, as :class:`Sparse`
(its nonzero elements only) when that is what the file will store, so a mostly-zero model is
never copied whole; the encoder writes a :class:`Sparse` exactly as it would the array.
"""

from __future__ import annotations

import hashlib
import math
import struct
import time
import zlib
from dataclasses import dataclass
from typing import Any

import msgpack
import numpy as np

MAGIC = b"THRSNAP\0"
VERSION = 1
PREFIX = struct.Struct("<8sHI")
CRC = struct.Struct("<I")
TREE = struct.Struct("<Q")
DIGEST_BYTES = 32
ALIGN = 64
MAX_HEADER_BYTES = 1 << 16
EXT_ARRAY, EXT_SCALAR = 1, 2
KINDS = "biufc"  # bool, signed, unsigned, float, complex: types whose bytes are the value
SLICE = 1 << 20  # elements per slice of a capture: its temporaries stay a few MiB


class CorruptSnapshot(Exception):
    """A snapshot file fails its magic, version, checksum or content checks."""


# -- arrays -------------------------------------------------------------------------------


class _Blobs:
    """The array bytes of one file, in order, each padded to ``ALIGN``."""

    def __init__(self) -> None:
        self.parts: list[bytes | memoryview] = []
        self.size = 0

    def add(self, data: bytes | memoryview) -> list[int]:
        start, length = self.size, len(data)
        self.parts.append(data)
        pad = -length % ALIGN
        if pad:
            self.parts.append(bytes(pad))
        self.size += length + pad
        return [start, length]


def _bits(flat: np.ndarray) -> np.ndarray:
    """The raw bits of each element, as unsigned integers (or rows of bytes past 8 bytes)."""
    size = flat.dtype.itemsize
    if size in (1, 2, 4, 8):
        return flat.view(np.dtype(f"u{size}"))
    return flat.view(np.uint8).reshape(flat.size, size)


@dataclass(frozen=True, slots=True)
class Sparse:
    """An array given by its nonzero elements, as a snapshot file stores it.

    ``where`` holds flat (C-order) indices, ascending, as ``index_dtype``; ``bits`` the raw bits
    of the elements there (see :func:`_bits`), so -0.0 and NaN payloads are kept exactly.
    """

    dtype: np.dtype[Any]
    shape: tuple[int, ...]
    index_dtype: str
    where: np.ndarray
    bits: np.ndarray


def _index_dtype(size: int) -> str:
    return "<u4" if size <= 2**32 else "<i8"


def _yield_gil() -> None:
    # numpy's nonzero counting keeps the GIL; a capture in a worker thread offers it to the
    # event loop between slices, so scoring waits at most one slice.
    time.sleep(0)


def capture(array: np.ndarray, *, copy: bool = True, step: int = SLICE) -> np.ndarray | Sparse:
    """The form a snapshot stores ``array`` in: :class:`Sparse` or a dense array.

    Sparse when its nonzero elements with their indices take fewer bytes than the array;
    they are found in slices of ``step`` elements, and the scan stops as soon as sparse cannot
    win. A dense result is a copy made slice by slice when ``copy``, else ``array`` itself.
    The caller keeps ``array`` unchanged meanwhile.
    """
    if array.dtype.kind not in KINDS:
        raise TypeError(f"snapshot state cannot hold numpy arrays of dtype {array.dtype}")
    flat = np.ascontiguousarray(array).reshape(-1)
    bits = _bits(flat)
    index_dtype = _index_dtype(flat.size)
    per_item = flat.dtype.itemsize + int(index_dtype[-1])
    found = _nonzero(bits, -(-flat.nbytes // per_item), index_dtype, step)
    if found is not None:
        return Sparse(flat.dtype, tuple(array.shape), index_dtype, *found)
    if not copy:
        return flat.reshape(array.shape)
    out = np.empty_like(flat)
    for lo in range(0, flat.size, step):
        np.copyto(out[lo : lo + step], flat[lo : lo + step])
        _yield_gil()
    return out.reshape(array.shape)


def _nonzero(
    bits: np.ndarray, limit: int, index_dtype: str, step: int
) -> tuple[np.ndarray, np.ndarray] | None:
    """(flat indices, bits) of the nonzero elements; None when there are ``limit`` or more.

    Counted in a first pass that stops at ``limit``, so a dense array is never gathered.
    """
    count = 0
    for lo in range(0, bits.shape[0], step):
        count += int(np.count_nonzero(_used(bits[lo : lo + step])))
        if count >= limit:
            return None
        _yield_gil()
    if count >= limit:  # an empty array: stored dense, as nothing beats zero bytes
        return None
    where = np.empty(count, index_dtype)
    kept = np.empty((count, *bits.shape[1:]), bits.dtype)
    at = 0
    for lo in range(0, bits.shape[0], step):
        part = bits[lo : lo + step]
        local = np.flatnonzero(_used(part))
        where[at : at + local.size] = local + lo
        kept[at : at + local.size] = part[local]
        at += local.size
        _yield_gil()
    return where, kept


def _used(bits: np.ndarray) -> np.ndarray:
    """Whether each element has a bit set, as bool (a row of bytes past 8-byte elements)."""
    return bits.any(axis=1) if bits.ndim == 2 else bits != 0


def _raw(array: np.ndarray) -> memoryview:
    """The bytes of a C-contiguous array, without copying them."""
    return memoryview(array.reshape(-1).view(np.uint8))


def _pack_array(array: np.ndarray | Sparse, blobs: _Blobs) -> msgpack.ExtType:
    if isinstance(array, np.ndarray):
        array = capture(array, copy=False)
    if isinstance(array, Sparse):
        head = [array.dtype.str, list(array.shape), "sparse", array.index_dtype]
        body = [*head, *blobs.add(_raw(array.where)), *blobs.add(_raw(array.bits))]
    else:
        body = [array.dtype.str, list(array.shape), "dense", *blobs.add(_raw(array))]
    return msgpack.ExtType(EXT_ARRAY, msgpack.packb(body))


def _dtype(text: Any) -> np.dtype[Any]:
    try:
        dtype = np.dtype(text) if isinstance(text, str) else None
    except TypeError:
        dtype = None
    if dtype is None or dtype.kind not in KINDS:
        raise CorruptSnapshot(f"snapshot holds an array of unknown dtype {text!r}")
    return dtype


def _blob(blobs: memoryview, start: Any, length: Any, expected: int) -> memoryview:
    if not isinstance(start, int) or length != expected or not 0 <= start <= len(blobs) - expected:
        raise CorruptSnapshot("snapshot holds an array whose bytes lie outside the file")
    return blobs[start : start + expected]


def _unpack_array(data: bytes, blobs: memoryview) -> np.ndarray:
    body = msgpack.unpackb(data, raw=False)
    if not isinstance(body, list) or len(body) not in (5, 8) or not isinstance(body[1], list):
        raise CorruptSnapshot("snapshot holds a malformed array")
    dtype, shape, mode = _dtype(body[0]), body[1], body[2]
    if not all(isinstance(n, int) and n >= 0 for n in shape):
        raise CorruptSnapshot(f"snapshot holds an array of impossible shape {shape!r}")
    size = math.prod(shape)
    if mode == "dense" and len(body) == 5:
        # A view into the loaded file: writable, and no second copy of large weights.
        raw = _blob(blobs, body[3], body[4], size * dtype.itemsize)
        return np.frombuffer(raw, dtype=dtype).reshape(shape)
    if mode == "sparse" and len(body) == 8 and body[3] in ("<u4", "<i8"):
        count = body[5] // int(body[3][-1]) if isinstance(body[5], int) else -1
        where = np.frombuffer(_blob(blobs, body[4], body[5], count * int(body[3][-1])), body[3])
        if where.size and (int(where.min()) < 0 or int(where.max()) >= size):
            raise CorruptSnapshot("snapshot holds a sparse array with indices out of range")
        out = np.zeros(size, dtype=dtype)
        bits = _bits(out)  # a view: writing the bits writes the values, exactly
        raw = _blob(blobs, body[6], body[7], where.size * dtype.itemsize)
        bits[where] = np.frombuffer(raw, bits.dtype).reshape((where.size, *bits.shape[1:]))
        return out.reshape(shape)
    raise CorruptSnapshot(f"snapshot holds an array with unknown storage {mode!r}")


def _default(obj: Any, blobs: _Blobs) -> Any:
    if isinstance(obj, np.ndarray | Sparse):
        return _pack_array(obj, blobs)
    if isinstance(obj, np.generic) and obj.dtype.kind in KINDS:
        return msgpack.ExtType(EXT_SCALAR, msgpack.packb([obj.dtype.str, obj.tobytes()]))
    raise TypeError(f"snapshot state cannot hold a {type(obj).__name__}")


def _ext_hook(code: int, data: bytes, blobs: memoryview) -> Any:
    if code == EXT_ARRAY:
        return _unpack_array(data, blobs)
    if code == EXT_SCALAR:
        text, raw = msgpack.unpackb(data, raw=False)
        return np.frombuffer(raw, dtype=_dtype(text))[0]
    raise CorruptSnapshot(f"snapshot holds an unknown extension type {code}")


# -- files --------------------------------------------------------------------------------


def encode_parts(state: dict[str, Any], meta: dict[str, Any]) -> list[bytes | memoryview]:
    """The pieces of a snapshot file before its digest; array bytes are not copied."""
    if not isinstance(state, dict):
        raise TypeError("a snapshot state must be a dict")
    blobs = _Blobs()
    header = msgpack.packb(meta, use_bin_type=True)
    tree = msgpack.packb(state, use_bin_type=True, default=lambda obj: _default(obj, blobs))
    head = b"".join(
        [PREFIX.pack(MAGIC, VERSION, len(header)), header, CRC.pack(zlib.crc32(header)),
         TREE.pack(len(tree))]
    )  # fmt: skip
    pad = -(len(head) + len(tree)) % ALIGN
    return [head, tree, bytes(pad), *blobs.parts]


def encode(state: dict[str, Any], *, meta: dict[str, Any] | None = None) -> bytes:
    """The snapshot file bytes for ``state``; ``meta`` is the small header listings read."""
    parts = encode_parts(state, meta or {})
    digest = hashlib.sha256()
    for part in parts:
        digest.update(part)
    return b"".join([*parts, digest.digest()])


def read_header(data: bytes | bytearray) -> tuple[dict[str, Any], int]:
    """The header map from the start of a snapshot file, and where the tree length begins."""
    if len(data) < PREFIX.size:
        raise CorruptSnapshot("snapshot is shorter than its fixed header")
    magic, version, length = PREFIX.unpack_from(data)
    if magic != MAGIC:
        raise CorruptSnapshot("not a thresher snapshot (bad magic)")
    if version != VERSION:
        raise CorruptSnapshot(f"snapshot format version {version}; this build reads {VERSION}")
    end = PREFIX.size + length
    if length > MAX_HEADER_BYTES or len(data) < end + CRC.size:
        raise CorruptSnapshot("snapshot header is truncated")
    raw = bytes(data[PREFIX.size : end])
    if CRC.unpack_from(data, end)[0] != zlib.crc32(raw):
        raise CorruptSnapshot("snapshot header fails its CRC-32 check")
    try:
        meta = msgpack.unpackb(raw, raw=False)
    except Exception as exc:  # msgpack raises several unrelated types on bad input
        raise CorruptSnapshot(f"snapshot header is not valid msgpack: {exc}") from exc
    if not isinstance(meta, dict):
        raise CorruptSnapshot("snapshot header is not a map")
    return meta, end + CRC.size


def decode_file(data: bytes | bytearray) -> tuple[dict[str, Any], dict[str, Any]]:
    """Verify a whole snapshot file and return ``(header, state)``.

    Dense arrays are views into ``data`` when it is a ``bytearray``; other input is copied once.
    """
    buf = data if isinstance(data, bytearray) else bytearray(data)
    view = memoryview(buf)
    if len(buf) < PREFIX.size + CRC.size + TREE.size + DIGEST_BYTES:
        raise CorruptSnapshot(f"snapshot is truncated ({len(buf)} bytes)")
    if hashlib.sha256(view[:-DIGEST_BYTES]).digest() != view[-DIGEST_BYTES:]:
        raise CorruptSnapshot("snapshot fails its SHA-256 check (damaged or truncated)")
    meta, start = read_header(buf)
    (length,) = TREE.unpack_from(buf, start)
    start += TREE.size
    end = start + length
    if end > len(buf) - DIGEST_BYTES:
        raise CorruptSnapshot("snapshot tree runs past the end of the file")
    blobs = view[end + (-end % ALIGN) : len(buf) - DIGEST_BYTES]
    try:
        state = msgpack.unpackb(
            view[start:end],
            raw=False,
            strict_map_key=False,
            ext_hook=lambda code, raw: _ext_hook(code, raw, blobs),
        )
    except CorruptSnapshot:
        raise
    except Exception as exc:  # msgpack raises several unrelated types on bad input
        raise CorruptSnapshot(f"snapshot body is not valid msgpack: {exc}") from exc
    if not isinstance(state, dict):
        raise CorruptSnapshot("snapshot body is not a map")
    return meta, state


def decode(data: bytes | bytearray) -> dict[str, Any]:
    """The state stored in snapshot bytes; raises :class:`CorruptSnapshot`."""
    return decode_file(data)[1]
