r"""Feature spec and the hashing trick: an event's fields become one sparse hashed vector.

PURE: no I/O, no clocks, no shared state; the only state is a :class:`Hasher`'s token cache.
Tokens (the text that is hashed), per DEVELOPERS.md:

    ^bias               value 1 on every event
    field=value         categorical: strings, integers (an integral float reads as one),
                        booleans as ``true``/``false``
    field:w, field:w v  text: lower-cased ``\w+`` runs and word n-grams up to ``ngrams``
    field#abc           text: character n-grams of each word padded as ``<word>`` (a padded
                        word shorter than n is one token)
    field               numeric, weighted by the value after log1p, then clip
    field@i             numeric with buckets: i = number of edges <= the transformed value
    field=member        set: one token per distinct member
    a=x&b=y             cross of declared fields in declared order; a bucketed numeric joins as
                        its bucket token ``p@i``, a plain one as ``p=<raw number>``; a set joins
                        as the product of its members (sorted, at most CROSS_CAP tokens)

A ``null`` value means the field is absent (a strict spec still refuses an undeclared name,
even with a null value). Repeated tokens add up. Fields are visited in a
fixed order (declared ones in spec order, the rest by name), so a permutation of an event's
fields or set members yields a bit-identical vector. Hashing follows Weinberger et al. (2009)
with MurmurHash3_x86_32 (Appleby): index = |h| mod 2**bits, sign = sign of h.
"""

from __future__ import annotations

import bisect
import itertools
import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import mmh3
import numpy as np

from .errors import InvalidConfig, InvalidEvent

__all__ = [
    "BIAS",
    "CROSS_CAP",
    "Batch",
    "FeatureSpec",
    "Featurizer",
    "FieldSpec",
    "Hasher",
    "SparseRow",
]

BIAS = "^bias"
CROSS_CAP = 64  # tokens one cross may add to one event; products of sets grow fast
KINDS = ("categorical", "text", "numeric", "set")
_OPTIONS: dict[str, tuple[str, ...]] = {
    "categorical": (),
    "text": ("ngrams", "char_ngrams"),
    "numeric": ("log1p", "clip", "buckets"),
    "set": (),
}
_SPEC_KEYS = ("fields", "crosses", "strict", "max_string_bytes", "max_tokens")
_MAX_BUCKETS = 1024
# Each value stays within +-1e30 so that even max_tokens of them summed fit in float32.
_VALUE_MAX = 1e30
_F32_ROUNDS_TO_ZERO = 2.0**-150  # float64 magnitudes at or below this become 0 in float32
_WORD = re.compile(r"\w+", re.UNICODE)
_CACHE_TOKEN_CHARS = 256  # longer tokens are hashed but not cached: the cache stays small


def _is_number(value: Any) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def _json_kind(value: Any) -> str:
    """How a value reads in JSON terms, for error messages."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "a boolean"
    if _is_number(value):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list | tuple):
        return "a list"
    if isinstance(value, Mapping):
        return "an object"
    return f"a {type(value).__name__}"


@dataclass(frozen=True, slots=True)
class FieldSpec:
    """How one declared field becomes tokens.

    Parameters
    ----------
    kind : {"categorical", "text", "numeric", "set"}
    ngrams : int, default 1
        Text only: word n-grams of every length 1..ngrams (1 to 5).
    char_ngrams : int, default 0
        Text only: character n-grams of this size (2 to 6) over each word padded as ``<word>``;
        0 turns them off.
    log1p : bool, default False
        Numeric only: replace x by log(1 + x) first; x must then be >= 0.
    clip : tuple (lo, hi) of float or None, default None
        Numeric only: then clip to [lo, hi].
    buckets : tuple of float or None, default None
        Numeric only: strictly increasing edges; the transformed value becomes the token
        ``field@i`` with value 1, where i (0..len(buckets)) counts the edges <= the value.
    """

    kind: str
    ngrams: int = 1
    char_ngrams: int = 0
    log1p: bool = False
    clip: tuple[float, float] | None = None
    buckets: tuple[float, ...] | None = None

    def to_json(self) -> dict[str, Any]:
        """The canonical JSON of this field: its kind and every option that applies."""
        out: dict[str, Any] = {"kind": self.kind}
        if self.kind == "text":
            out.update(ngrams=self.ngrams, char_ngrams=self.char_ngrams)
        elif self.kind == "numeric":
            out["log1p"] = self.log1p
            if self.clip is not None:
                out["clip"] = list(self.clip)
            if self.buckets is not None:
                out["buckets"] = list(self.buckets)
        return out


@dataclass(frozen=True)
class FeatureSpec:
    """A validated feature spec: declared fields, crosses and limits.

    Parameters
    ----------
    fields : mapping of str to FieldSpec, default empty
        Declared fields, in the order their tokens are made.
    crosses : tuple of tuples of 2 or 3 field names, default ()
        Declared non-text fields whose combined values make one token each.
    strict : bool, default False
        Refuse fields the spec does not declare (even when null); otherwise their kinds are
        inferred: string or boolean categorical, number numeric, list set, null ignored, and
        an object is refused.
    max_string_bytes : int, default 65536
        Longest string value or set member, in UTF-8 bytes.
    max_tokens : int, default 100000
        Most tokens one event may make, the bias included.

    Build one with :meth:`from_json`; ``FeatureSpec()`` (or ``from_json(None)``) infers all.
    """

    fields: Mapping[str, FieldSpec] = field(default_factory=dict)
    crosses: tuple[tuple[str, ...], ...] = ()
    strict: bool = False
    max_string_bytes: int = 65536
    max_tokens: int = 100000

    @classmethod
    def from_json(cls, obj: Mapping[str, Any] | None, *, path: str = "features") -> FeatureSpec:
        """Validate a spec's JSON; raises InvalidConfig with the path of the bad value."""
        if obj is None:
            return cls()
        if not isinstance(obj, Mapping):
            raise InvalidConfig(
                'the feature spec must be an object like {"fields": {...}}, or null to infer '
                "every field's kind",
                path=path,
            )
        for key in obj:
            if key not in _SPEC_KEYS:
                raise InvalidConfig(
                    f"unknown key {key!r}; a feature spec has {', '.join(_SPEC_KEYS)}",
                    path=f"{path}.{key}",
                )
        raw = obj.get("fields", {})
        if not isinstance(raw, Mapping):
            raise InvalidConfig(
                'fields must be an object of field name to options, like {"title": {"kind": '
                '"text"}}',
                path=f"{path}.fields",
            )
        fields = {name: _parse_field(name, opts, f"{path}.fields") for name, opts in raw.items()}
        strict = obj.get("strict", False)
        if not isinstance(strict, bool):
            raise InvalidConfig("strict must be true or false", path=f"{path}.strict")
        return cls(
            fields=fields,
            crosses=_parse_crosses(obj.get("crosses", []), fields, f"{path}.crosses"),
            strict=strict,
            max_string_bytes=_positive_int(obj, "max_string_bytes", 65536, path),
            max_tokens=_positive_int(obj, "max_tokens", 100000, path),
        )

    def to_json(self) -> dict[str, Any]:
        """Canonical JSON; ``FeatureSpec.from_json(spec.to_json()) == spec``."""
        return {
            "fields": {name: fs.to_json() for name, fs in self.fields.items()},
            "crosses": [list(cross) for cross in self.crosses],
            "strict": self.strict,
            "max_string_bytes": self.max_string_bytes,
            "max_tokens": self.max_tokens,
        }


def _positive_int(obj: Mapping[str, Any], key: str, default: int, path: str) -> int:
    value = obj.get(key, default)
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise InvalidConfig(
            f"{key} must be a positive integer (default {default})", path=f"{path}.{key}"
        )
    return value


def _option_int(opts: Mapping[str, Any], key: str, default: int, allowed: str, path: str) -> int:
    value = opts.get(key, default)
    ok = range(1, 6) if key == "ngrams" else (0, 2, 3, 4, 5, 6)
    if isinstance(value, bool) or not isinstance(value, int) or value not in ok:
        raise InvalidConfig(f"{key} must be an integer {allowed}, got {value!r}", path=path)
    return value


def _finite(value: Any, what: str, path: str) -> float:
    if not _is_number(value) or not math.isfinite(value):
        raise InvalidConfig(f"{what} must be a finite number, got {value!r}", path=path)
    return float(value)


def _parse_field(name: Any, opts: Any, path: str) -> FieldSpec:
    if not isinstance(name, str) or not name:
        raise InvalidConfig("field names must be non-empty strings", path=path)
    path = f"{path}.{name}"
    if not isinstance(opts, Mapping):
        raise InvalidConfig(
            'each field needs an object of options, like {"kind": "text"}', path=path
        )
    kind = opts.get("kind")
    if kind not in _OPTIONS:
        raise InvalidConfig(
            f"unknown kind {kind!r}; use one of {', '.join(KINDS)}", path=f"{path}.kind"
        )
    for key in opts:
        if key != "kind" and key not in _OPTIONS[kind]:
            allowed = ", ".join(_OPTIONS[kind]) or "no options"
            raise InvalidConfig(
                f"unknown option {key!r} for a {kind} field; it takes {allowed}",
                path=f"{path}.{key}",
            )
    if kind == "text":
        return FieldSpec(
            kind,
            ngrams=_option_int(opts, "ngrams", 1, "from 1 to 5", f"{path}.ngrams"),
            char_ngrams=_option_int(
                opts, "char_ngrams", 0, "from 2 to 6, or 0 for none", f"{path}.char_ngrams"
            ),
        )
    if kind != "numeric":
        return FieldSpec(kind)
    log1p = opts.get("log1p", False)
    if not isinstance(log1p, bool):
        raise InvalidConfig("log1p must be true or false", path=f"{path}.log1p")
    clip = opts.get("clip")
    if clip is not None:
        if not isinstance(clip, list | tuple) or len(clip) != 2:
            raise InvalidConfig("clip must be a pair [lo, hi]", path=f"{path}.clip")
        lo, hi = (_finite(v, "clip bounds", f"{path}.clip[{i}]") for i, v in enumerate(clip))
        if not lo < hi:
            raise InvalidConfig(f"clip needs lo < hi, got [{lo}, {hi}]", path=f"{path}.clip")
        clip = (lo, hi)
    buckets = opts.get("buckets")
    if buckets is not None:
        if not isinstance(buckets, list | tuple) or not 0 < len(buckets) <= _MAX_BUCKETS:
            raise InvalidConfig(
                f"buckets must be a list of 1 to {_MAX_BUCKETS} edges", path=f"{path}.buckets"
            )
        edges = [_finite(v, "bucket edges", f"{path}.buckets[{i}]") for i, v in enumerate(buckets)]
        for i in range(1, len(edges)):
            if not edges[i - 1] < edges[i]:
                raise InvalidConfig(
                    f"bucket edges must be strictly increasing: {edges[i - 1]} then {edges[i]}",
                    path=f"{path}.buckets[{i}]",
                )
        buckets = tuple(edges)
    return FieldSpec(kind, log1p=log1p, clip=clip, buckets=buckets)


def _parse_crosses(
    raw: Any, fields: Mapping[str, FieldSpec], path: str
) -> tuple[tuple[str, ...], ...]:
    if not isinstance(raw, list | tuple):
        raise InvalidConfig(
            'crosses must be a list of field-name lists, like [["a", "b"]]', path=path
        )
    crosses: list[tuple[str, ...]] = []
    for i, cross in enumerate(raw):
        where = f"{path}[{i}]"
        if not isinstance(cross, list | tuple) or len(cross) not in (2, 3):
            raise InvalidConfig("a cross is a list of 2 or 3 field names", path=where)
        for j, name in enumerate(cross):
            spec = fields.get(name) if isinstance(name, str) else None
            if spec is None:
                raise InvalidConfig(
                    f"{name!r} is not a declared field; declare it under fields first",
                    path=f"{where}[{j}]",
                )
            if spec.kind == "text":
                raise InvalidConfig(
                    f"text field {name!r} cannot be crossed; cross categorical, numeric or set "
                    "fields",
                    path=f"{where}[{j}]",
                )
        if len(set(cross)) != len(cross):
            raise InvalidConfig("a cross needs distinct fields", path=where)
        if any(set(cross) == set(seen) for seen in crosses):
            raise InvalidConfig(f"cross {list(cross)} is declared twice", path=where)
        crosses.append(tuple(cross))
    return tuple(crosses)


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


def _csr(
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


def _row(codes: list[int], values: list[float]) -> SparseRow:
    """One row as _csr would make it, without numpy's per-call cost on a few dozen tokens."""
    sums: dict[int, float] = {}
    get = sums.get
    for code, value in zip(codes, values, strict=True):
        if code < 0:
            code, value = ~code, -value
        sums[code] = get(code, 0.0) + value  # input order, as bincount adds in _csr
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
        row = _row(self.codes(tokens), list(values))
        return row.indices, row.values


def _number_text(value: int | float) -> str:
    """Raw number text for crosses; 3 and 3.0 read the same."""
    if isinstance(value, float) and value.is_integer() and abs(value) < 2**53:
        return str(int(value))
    return str(value)


_PLAIN_NUMERIC = FieldSpec("numeric")


class Featurizer:
    """Turns an event's fields into tokens and hashed sparse vectors.

    Parameters
    ----------
    spec : FeatureSpec
    bits, seed, signed : see :class:`Hasher` (defaults 20, 0, True)
    cache_size : int, default 65536
        Token-hash cache size of the underlying Hasher.

    Errors are :class:`~thresher.errors.InvalidEvent` whose ``path`` extends the ``path``
    argument, e.g. ``events[3].fields.price``.
    """

    def __init__(
        self,
        spec: FeatureSpec,
        bits: int = 20,
        seed: int = 0,
        signed: bool = True,
        *,
        cache_size: int = 65536,
    ) -> None:
        self.spec = spec
        self.hasher = Hasher(bits, seed, signed, cache_size)
        self._short = spec.max_string_bytes // 4  # UTF-8 needs at most 4 bytes per character
        crossed = {name for cross in spec.crosses for name in cross}
        # One (name, emitter, its argument, cross mode) per declared field, made once so the
        # per-event loop does no option lookups. Cross mode: 0 not crossed, 1 crossed by its
        # tokens, 2 crossed by its raw number.
        self._plan = tuple(
            (name, *self._emitter(name, fs), 0 if name not in crossed else self._mode(fs))
            for name, fs in spec.fields.items()
        )

    @staticmethod
    def _mode(fs: FieldSpec) -> int:
        return 2 if fs.kind == "numeric" and fs.buckets is None else 1

    def _emitter(self, name: str, fs: FieldSpec) -> tuple[Any, Any]:
        if fs.kind == "categorical":
            return self._emit_categorical, name + "="
        if fs.kind == "set":
            return self._emit_set, name + "="
        if fs.kind == "text":
            return self._emit_text, (fs.ngrams, fs.char_ngrams, name + ":", name + "#")
        if fs.buckets is None:
            return self._emit_numeric, fs
        return self._emit_bucket, (fs, tuple(f"{name}@{i}" for i in range(len(fs.buckets) + 1)))

    @property
    def bits(self) -> int:
        """Hash bits: vectors have 2**bits entries."""
        return self.hasher.bits

    def tokens(self, fields: Mapping[str, Any], path: str = "fields") -> list[tuple[str, float]]:
        """The event's (token, value) pairs before hashing, repeats not yet summed."""
        tokens, values = self._collect(fields, path)
        self._codes(tokens, fields, path)  # the same checks as transform: valid Unicode
        return list(zip(tokens, values, strict=True))

    def transform(self, fields: Mapping[str, Any], path: str = "fields") -> SparseRow:
        """One event's hashed vector."""
        tokens, values = self._collect(fields, path)
        return _row(self._codes(tokens, fields, path), values)

    def transform_with_tokens(
        self, fields: Mapping[str, Any], path: str = "fields"
    ) -> tuple[SparseRow, list[tuple[str, int, float]]]:
        """The vector plus each token's (text, index, signed value), to explain a score."""
        tokens, values = self._collect(fields, path)
        codes = self._codes(tokens, fields, path)
        explained = [
            (t, c, v) if c >= 0 else (t, ~c, -v)
            for t, c, v in zip(tokens, codes, values, strict=True)
        ]
        return _row(codes, values), explained

    def transform_batch(self, events: Sequence[Mapping[str, Any]], path: str = "events") -> Batch:
        """Many events (field mappings) as one CSR batch; event i reports ``path[i].fields``."""
        codes: list[int] = []
        values: list[float] = []
        counts: list[int] = []
        for i, fields in enumerate(events):
            where = f"{path}[{i}].fields"
            tokens, vals = self._collect(fields, where)
            codes += self._codes(tokens, fields, where)
            values += vals
            counts.append(len(tokens))
        return Batch(*_csr(codes, values, counts, self.hasher.bits))

    # -- hashing ---------------------------------------------------------------------------

    def _codes(self, tokens: list[str], fields: Mapping[str, Any], path: str) -> list[int]:
        try:
            return self.hasher.codes(tokens)
        except UnicodeEncodeError:
            raise self._bad_unicode(fields, path) from None

    @staticmethod
    def _bad_unicode(fields: Mapping[str, Any], path: str) -> InvalidEvent:
        """Find the string that is not valid Unicode (JSON allows lone surrogate escapes)."""
        for name, value in fields.items():
            members = value if isinstance(value, list | tuple) else [value]
            for text in (name, *members):
                try:
                    if isinstance(text, str):
                        text.encode("utf-8")
                except UnicodeEncodeError:
                    return InvalidEvent(
                        "string holds a lone surrogate, which is not valid Unicode; send "
                        "well-formed text",
                        path=f"{path}.{name}",
                    )
        return InvalidEvent("a string is not valid Unicode; send well-formed text", path=path)

    # -- tokens ----------------------------------------------------------------------------

    def _collect(self, fields: Any, path: str) -> tuple[list[str], list[float]]:
        if type(fields) is not dict and not isinstance(fields, Mapping):
            raise InvalidEvent(
                f"fields must be an object of field name to value, got {_json_kind(fields)}",
                path=path,
            )
        tokens, values = [BIAS], [1.0]
        parts: dict[str, list[str]] = {}
        seen = 0
        get = fields.get
        for name, emit, arg, mode in self._plan:
            value = get(name)
            if value is None:
                seen += name in fields
                continue
            seen += 1
            if mode:
                start = len(tokens)
                emit(name, arg, value, path, tokens, values)
                parts[name] = tokens[start:] if mode == 1 else [f"{name}={_number_text(value)}"]
            else:
                emit(name, arg, value, path, tokens, values)
        if seen < len(fields):
            self._undeclared(fields, path, tokens, values)
        if parts:
            for cross in self.spec.crosses:
                lists = [parts.get(name, ()) for name in cross]
                if all(lists):  # a missing field (or an empty set) skips the cross
                    for combo in itertools.islice(itertools.product(*lists), CROSS_CAP):
                        tokens.append("&".join(combo))
                        values.append(1.0)
        self._check_count(tokens, path)
        return tokens, values

    def _undeclared(
        self, fields: Mapping[str, Any], path: str, tokens: list[str], values: list[float]
    ) -> None:
        declared = self.spec.fields
        names = [name for name in fields if name not in declared]
        for name in names:
            if not isinstance(name, str):
                raise InvalidEvent(f"field names must be strings, got {name!r:.40}", path=path)
        names.sort()
        if self.spec.strict:
            raise InvalidEvent(
                f"unknown field {names[0]!r}: this model's feature spec is strict and declares "
                f"{', '.join(declared) or 'no fields'}; drop the field or declare it",
                path=f"{path}.{names[0]}",
            )
        for name in names:
            value = fields[name]
            if value is None:
                continue
            self._check_string(name, name, path)
            if isinstance(value, str | bool):
                self._emit_categorical(name, name + "=", value, path, tokens, values)
            elif _is_number(value):
                self._emit_numeric(name, _PLAIN_NUMERIC, value, path, tokens, values)
            elif isinstance(value, list | tuple):
                self._emit_set(name, name + "=", value, path, tokens, values)
            else:
                raise InvalidEvent(
                    f"{_json_kind(value)} fits no feature kind; nested objects are not read, "
                    "so flatten them into fields such as 'address.city'",
                    path=f"{path}.{name}",
                )

    def _check_count(self, tokens: list[str], path: str) -> None:
        if len(tokens) > self.spec.max_tokens:
            raise InvalidEvent(
                f"the event makes {len(tokens)} tokens, over the feature spec's max_tokens of "
                f"{self.spec.max_tokens}; shorten its text or sets, lower ngrams or char_ngrams, "
                "or raise max_tokens",
                path=path,
            )

    def _check_string(self, text: str, name: str, path: str, where: str = "") -> None:
        if len(text) > self._short:
            size = len(text.encode("utf-8", "surrogatepass"))
            if size > self.spec.max_string_bytes:
                raise InvalidEvent(
                    f"string of {size} UTF-8 bytes is over the feature spec's max_string_bytes "
                    f"of {self.spec.max_string_bytes}; shorten it or raise the limit",
                    path=f"{path}.{name}{where}",
                )

    def _emit_categorical(
        self, name: str, prefix: str, value: Any, path: str, tokens: list[str], values: list[float]
    ) -> None:
        if isinstance(value, str):
            if len(value) > self._short:
                self._check_string(value, name, path)
            tokens.append(prefix + value)
        elif isinstance(value, bool):
            tokens.append(prefix + ("true" if value else "false"))
        elif isinstance(value, int):
            tokens.append(prefix + str(value))
        elif isinstance(value, float) and value.is_integer() and abs(value) < 2**53:
            tokens.append(prefix + str(int(value)))
        else:
            raise InvalidEvent(
                f"a categorical field takes a string, an integer or a boolean, got "
                f"{_json_kind(value)} {value!r:.40}; send it as a string, or declare the field "
                "numeric",
                path=f"{path}.{name}",
            )
        values.append(1.0)

    def _number(self, name: str, fs: FieldSpec, value: Any, path: str) -> float:
        if type(value) is float:
            x = value
        elif _is_number(value):
            try:
                x = float(value)
            except OverflowError:
                x = math.inf
        else:
            raise InvalidEvent(
                f"a numeric field takes a number, got {_json_kind(value)}; send a JSON number",
                path=f"{path}.{name}",
            )
        if x - x != 0.0:  # true only for NaN and infinities
            raise InvalidEvent(
                f"{value!r:.40} is not a finite number; send a finite value or omit the field",
                path=f"{path}.{name}",
            )
        if fs.log1p:
            if x < 0:
                raise InvalidEvent(
                    f"{x!r} is negative but the field applies log1p, which needs values >= 0; "
                    "send a non-negative value or drop log1p from the spec",
                    path=f"{path}.{name}",
                )
            x = math.log1p(x)
        if fs.clip is not None:
            x = min(max(x, fs.clip[0]), fs.clip[1])
        return x

    def _emit_numeric(
        self,
        name: str,
        fs: FieldSpec,
        value: Any,
        path: str,
        tokens: list[str],
        values: list[float],
    ) -> None:
        x = self._number(name, fs, value, path)
        if abs(x) > _VALUE_MAX:
            raise InvalidEvent(
                f"{x!r} is beyond the feature value range of +-1e30; scale it, or set log1p, "
                "clip or buckets on the field",
                path=f"{path}.{name}",
            )
        tokens.append(name)
        values.append(x)

    def _emit_bucket(
        self,
        name: str,
        arg: tuple[FieldSpec, tuple[str, ...]],
        value: Any,
        path: str,
        tokens: list[str],
        values: list[float],
    ) -> None:
        fs, bucket_tokens = arg
        x = self._number(name, fs, value, path)
        tokens.append(bucket_tokens[bisect.bisect_right(fs.buckets, x)])  # type: ignore[arg-type]
        values.append(1.0)

    def _emit_set(
        self, name: str, prefix: str, value: Any, path: str, tokens: list[str], values: list[float]
    ) -> None:
        if not isinstance(value, list | tuple):
            raise InvalidEvent(
                f'a set field takes a list of strings, got {_json_kind(value)}; send ["a", "b"]',
                path=f"{path}.{name}",
            )
        short = self._short
        for i, member in enumerate(value):
            if not isinstance(member, str):
                raise InvalidEvent(
                    f"set members must be strings, got {_json_kind(member)}; send each member "
                    "as a string",
                    path=f"{path}.{name}[{i}]",
                )
            if len(member) > short:
                self._check_string(member, name, path, f"[{i}]")
        # Sorted distinct members: a set's order and repeats never change the vector.
        made = [prefix + member for member in sorted(set(value))]
        tokens += made
        values += [1.0] * len(made)
        self._check_count(tokens, f"{path}.{name}")

    def _emit_text(
        self,
        name: str,
        arg: tuple[int, int, str, str],
        value: Any,
        path: str,
        tokens: list[str],
        values: list[float],
    ) -> None:
        if not isinstance(value, str):
            raise InvalidEvent(
                f"a text field takes a string, got {_json_kind(value)}; send the text as a "
                "string, or declare the field numeric or categorical",
                path=f"{path}.{name}",
            )
        if len(value) > self._short:
            self._check_string(value, name, path)
        ngrams, k, prefix, char_prefix = arg
        words = _WORD.findall(value.lower())
        made = [prefix + word for word in words]
        for n in range(2, ngrams + 1):
            made += [prefix + " ".join(words[i : i + n]) for i in range(len(words) - n + 1)]
        if k:
            for word in words:
                padded = f"<{word}>"
                if len(padded) < k:
                    made.append(char_prefix + padded)
                else:
                    made += [char_prefix + padded[i : i + k] for i in range(len(padded) - k + 1)]
        tokens += made
        values += [1.0] * len(made)
        self._check_count(tokens, f"{path}.{name}")
