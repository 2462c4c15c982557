"""The hashing trick: tokens become a sparse vector of 2**bits signed, summed entries.

PURE: no I/O, no clocks; the only state is a :class:`Hasher`'s bounded cache of token hashes.
Hashing follows Weinberger et al. (2009) with MurmurHash3_x86_32 (Appleby): index = |h| mod
2**bits, sign = sign of h. :class:`SparseRow` is one event's vector and :class:`Batch` many as
CSR; :mod:`thresher.features` re-exports all three.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import NamedTuple

import mmh3
import numpy as np

from .errors import InvalidConfig

_F32_ROUNDS_TO_ZERO = 2.0**-150  # float64 magnitudes at or below this become 0 in float32
_CACHE_TOKEN_CHARS = 256  # longer tokens are hashed but not cached: the cache stays small


class SparseRow(NamedTuple):
    """One event's hashed vector.

    Attributes
    ----------
    indices : ndarray of int64, shape (nnz,)
        Feature indices in [0, 2**bits), strictly increasing.
    values : ndarray of float32, shape (nnz,)
        Summed signed token values; never 0.
    """

    indices: np.ndarray
    values: np.ndarray


class Batch(NamedTuple):
    """Many events' hashed vectors as one CSR matrix of shape (n_events, 2**bits).

    Attributes
    ----------
    indptr : ndarray of int64, shape (n_events + 1,)
        Row i is ``indices[indptr[i]:indptr[i + 1]]``.
    indices : ndarray of int64, shape (nnz,)
        Strictly increasing within each row.
    values : ndarray of float32, shape (nnz,)
        Never 0.
    """

    indptr: np.ndarray
    indices: np.ndarray
    values: np.ndarray

    def row(self, i: int) -> SparseRow:
        """Row i as a SparseRow (views, not copies)."""
        lo, hi = int(self.indptr[i]), int(self.indptr[i + 1])
        return SparseRow(self.indices[lo:hi], self.values[lo:hi])


def to_csr(
    codes: list[int], values: list[float], counts: list[int], bits: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sum duplicates per row, drop zeros, sort: one numpy pass over a whole batch."""
    code = np.array(codes, dtype=np.int64)
    value = np.array(values, dtype=np.float64)
    negative = code < 0
    index = np.where(negative, ~code, code)
    value = np.where(negative, -value, value)
    n_rows = len(counts)
    key = index
    if n_rows > 1:  # row-major keys make one sort group by row, then by index
        key = (np.repeat(np.arange(n_rows, dtype=np.int64), counts) << bits) | index
    # A stable sort keeps repeats in input order and bincount adds them in that order, so a
    # row sums bit-identically alone or inside any batch.
    order = np.argsort(key, kind="stable")
    key = key[order]
    first = np.empty(len(key), dtype=bool)
    first[:1] = True
    np.not_equal(key[1:], key[:-1], out=first[1:])
    unique = key[first]
    group = np.cumsum(first) - 1
    sums = np.bincount(group, weights=value[order], minlength=len(unique)).astype(np.float32)
    keep = sums != 0
    unique, sums = unique[keep], sums[keep]
    indptr = np.zeros(n_rows + 1, dtype=np.int64)
    if n_rows:
        np.cumsum(np.bincount(unique >> bits, minlength=n_rows), out=indptr[1:])
    return indptr, unique & ((1 << bits) - 1), sums


def to_row(codes: list[int], values: list[float]) -> SparseRow:
    """One row as to_csr would make it, without numpy's per-call cost on a few dozen tokens."""
    sums: dict[int, float] = {}
    get = sums.get
    for code, value in zip(codes, values, strict=True):
        if code < 0:
            code, value = ~code, -value
        sums[code] = get(code, 0.0) + value  # input order, as bincount adds in to_csr
    indices = [i for i in sorted(sums) if abs(sums[i]) > _F32_ROUNDS_TO_ZERO]
    return SparseRow(
        np.array(indices, dtype=np.int64), np.array([sums[i] for i in indices], dtype=np.float32)
    )


class Hasher:
    """MurmurHash3_x86_32 hashing trick with a bounded cache of token hashes.

    Parameters
    ----------
    bits : int, default 20
        The vector has 2**bits entries; 10 to 28.
    seed : int, default 0
        MurmurHash3 seed, 0 to 2**32 - 1 (per model).
    signed : bool, default True
        Multiply each token's value by the sign of its hash (Weinberger et al., 2009), so
        collisions cancel in expectation; when False every sign is +1.
    cache_size : int, default 65536
        Most cached tokens; the cache empties when full (faster here than an LRU).

    At seed 0 with ``signed=True`` the output equals scikit-learn's FeatureHasher with
    ``alternate_sign=True`` (index = |h| mod 2**bits, h the signed hash of the UTF-8 token).
    """

    def __init__(
        self, bits: int = 20, seed: int = 0, signed: bool = True, cache_size: int = 65536
    ) -> None:
        if isinstance(bits, bool) or not isinstance(bits, int) or not 10 <= bits <= 28:
            raise InvalidConfig(f"bits must be an integer from 10 to 28, got {bits!r}", path="bits")
        if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed < 2**32:
            raise InvalidConfig("seed must be an integer from 0 to 4294967295", path="seed")
        if not isinstance(signed, bool):
            raise InvalidConfig("signed must be true or false", path="signed")
        if isinstance(cache_size, bool) or not isinstance(cache_size, int) or cache_size < 1:
            raise InvalidConfig("cache_size must be a positive integer", path="cache_size")
        self.bits, self.seed, self.signed, self.cache_size = bits, seed, signed, cache_size
        self.n_features = 1 << bits
        # Token -> index, or ~index (negative) when the token's sign is -1.
        self._cache: dict[str, int] = {}

    def _miss(self, token: str) -> int:
        # Bytes, not str: mmh3 5.x crashes the process on a str holding a lone surrogate, and
        # encode raises UnicodeEncodeError for it instead.
        h = mmh3.hash(token.encode("utf-8"), self.seed, signed=True)
        code = abs(h) & (self.n_features - 1)
        if h < 0 and self.signed:
            code = ~code
        if len(token) <= _CACHE_TOKEN_CHARS:
            if len(self._cache) >= self.cache_size:
                self._cache.clear()
            self._cache[token] = code
        return code

    def codes(self, tokens: Sequence[str]) -> list[int]:
        """Each token's code: its index, or ~index when its sign is -1."""
        get = self._cache.get
        out = [get(token) for token in tokens]
        if None in out:
            for i, code in enumerate(out):
                if code is None:
                    out[i] = self._miss(tokens[i])
        return out  # type: ignore[return-value]

    def index_sign(self, token: str) -> tuple[int, int]:
        """The (index, sign) of one token."""
        code = self.codes([token])[0]
        return (code, 1) if code >= 0 else (~code, -1)

    def hash_tokens(
        self, tokens: Sequence[str], values: Sequence[float] | None = None
    ) -> tuple[np.ndarray, np.ndarray]:
        """Hash tokens (value 1 each unless given): int64 indices, float32 summed values."""
        if values is None:
            values = [1.0] * len(tokens)
        elif len(values) != len(tokens):
            raise ValueError(f"{len(tokens)} tokens but {len(values)} values")
        row = to_row(self.codes(tokens), list(values))
        return row.indices, row.values
