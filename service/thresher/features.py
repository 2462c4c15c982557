r"""Events to features: the :class:`Featurizer` turns an event's fields into one sparse vector.

The public face of the feature layer: the spec (:mod:`thresher.features_spec`), the per-kind
token makers (:mod:`thresher.field_tokens`) and the hashing trick (:mod:`thresher.hashing`) are
re-exported from here. PURE: no I/O, no clocks, no shared state; the only state is a
:class:`Hasher`'s token cache. Tokens (the text that is hashed), per DEVELOPERS.md:

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

import itertools
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np

from .errors import InvalidEvent
from .features_spec import KINDS as KINDS
from .features_spec import FeatureSpec, FieldSpec, is_number, json_kind
from .field_tokens import FieldTokens
from .hashing import Batch, Hasher, SparseRow, to_csr, to_row

try:  # the compiled fast path (_featurize.c); the Python path below is its reference
    from . import _featurize
except ImportError:  # pragma: no cover - a source checkout that was never built
    _featurize = None  # type: ignore[assignment]

__all__ = [
    "BIAS",
    "CROSS_CAP",
    "TOKEN_RULES",
    "Batch",
    "FeatureSpec",
    "Featurizer",
    "FieldSpec",
    "Hasher",
    "SparseRow",
]

BIAS = "^bias"
CROSS_CAP = 64  # tokens one cross may add to one event; products of sets grow fast
# The version of the token and hashing rules above. Label records store the rows they made
# under a fingerprint that includes it (records.fingerprint): bump it with any change to how
# fields become a row, so that stored rows are made again from their fields.
TOKEN_RULES = 1


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
    native : bool, default True
        Use the compiled kernel (``thresher._featurize``) for :meth:`transform` and
        :meth:`transform_batch` when it is built. It gives bit-identical rows and hands any
        event it does not handle the same way (every error among them) to the Python path;
        False forces the Python path, which tests compare it with.

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
        native: bool = True,
    ) -> None:
        self.spec = spec
        self.hasher = Hasher(bits, seed, signed, cache_size)
        self._kinds = FieldTokens(spec)
        crossed = {name for cross in spec.crosses for name in cross}
        # One (name, emitter, its argument, cross mode) per declared field, made once so the
        # per-event loop does no option lookups. Cross mode: 0 not crossed, 1 crossed by its
        # tokens, 2 crossed by its raw number.
        self._plan = tuple(
            (name, *self._emitter(name, fs), 0 if name not in crossed else self._mode(fs))
            for name, fs in spec.fields.items()
        )
        self._native = self._compile() if native and _featurize is not None else None

    def _compile(self) -> Any:
        """The spec as a compiled plan: fields in spec order, crosses as field indices."""
        spec, order = self.spec, {name: i for i, name in enumerate(self.spec.fields)}
        fields = []
        for (name, _, _, cross), fs in zip(self._plan, spec.fields.values(), strict=True):
            kind = {"categorical": 0, "text": 1, "set": 4}.get(fs.kind)
            if kind is None:
                kind = 2 if fs.buckets is None else 3
            fields.append((name, kind, cross, fs.ngrams, fs.char_ngrams, fs.log1p, fs.clip,
                           fs.buckets))  # fmt: skip
        hasher = self.hasher
        return _featurize.Plan(
            fields,
            [tuple(order[name] for name in cross) for cross in spec.crosses],
            spec.strict,
            spec.max_tokens,
            spec.max_string_bytes // 4,  # longer strings: Python counts their UTF-8 bytes
            hasher.seed,
            hasher.bits,
            hasher.signed,
        )

    @staticmethod
    def _mode(fs: FieldSpec) -> int:
        return 2 if fs.kind == "numeric" and fs.buckets is None else 1

    def _emitter(self, name: str, fs: FieldSpec) -> tuple[Any, Any]:
        kinds = self._kinds
        if fs.kind == "categorical":
            return kinds.emit_categorical, name + "="
        if fs.kind == "set":
            return kinds.emit_set, name + "="
        if fs.kind == "text":
            return kinds.emit_text, (fs.ngrams, fs.char_ngrams, name + ":", name + "#")
        if fs.buckets is None:
            return kinds.emit_numeric, fs
        return kinds.emit_bucket, (fs, tuple(f"{name}@{i}" for i in range(len(fs.buckets) + 1)))

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
        if self._native is not None:
            made = self._native.row(fields)
            if made is not None:
                return SparseRow(
                    np.frombuffer(made[0], np.int64), np.frombuffer(made[1], np.float32)
                )
        tokens, values = self._collect(fields, path)
        return to_row(self._codes(tokens, fields, path), values)

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
        return to_row(codes, values), explained

    def transform_batch(self, events: Sequence[Mapping[str, Any]], path: str = "events") -> Batch:
        """Many events (field mappings) as one CSR batch; event i reports ``path[i].fields``."""
        if self._native is not None:
            ptr, idx, val = self._native.batch(events, self._fallback(events, path))
            return Batch(
                np.frombuffer(ptr, np.int64),
                np.frombuffer(idx, np.int64),
                np.frombuffer(val, np.float32),
            )
        codes: list[int] = []
        values: list[float] = []
        counts: list[int] = []
        for i, fields in enumerate(events):
            where = f"{path}[{i}].fields"
            tokens, vals = self._collect(fields, where)
            codes += self._codes(tokens, fields, where)
            values += vals
            counts.append(len(tokens))
        return Batch(*to_csr(codes, values, counts, self.hasher.bits))

    def transform_batch_views(
        self, events: Sequence[Mapping[str, Any]], path: str = "events"
    ) -> tuple[Any, Any, Any]:
        """:meth:`transform_batch`'s three arrays, as typed memoryviews when compiled.

        For the scoring path: a kernel reads them as they are, and for a one-event request
        making three numpy arrays costs about as much as scoring the event.
        """
        if self._native is None:
            return self.transform_batch(events, path)
        ptr, idx, val = self._native.batch(events, self._fallback(events, path))
        return memoryview(ptr).cast("q"), memoryview(idx).cast("q"), memoryview(val).cast("f")

    def _fallback(
        self, events: Sequence[Mapping[str, Any]], path: str
    ) -> Callable[[int], tuple[list[int], list[float]]]:
        """What the kernel calls for an event it hands back: the reference path's row i."""

        def python_path(i: int) -> tuple[list[int], list[float]]:
            where, fields = f"{path}[{i}].fields", events[i]
            tokens, vals = self._collect(fields, where)
            return self._codes(tokens, fields, where), vals

        return python_path

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
                f"fields must be an object of field name to value, got {json_kind(fields)}",
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
        self._kinds.check_count(tokens, path)
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
        kinds = self._kinds
        for name in names:
            value = fields[name]
            if value is None:
                continue
            kinds.check_string(name, name, path)
            if isinstance(value, str | bool):
                kinds.emit_categorical(name, name + "=", value, path, tokens, values)
            elif is_number(value):
                kinds.emit_numeric(name, _PLAIN_NUMERIC, value, path, tokens, values)
            elif isinstance(value, list | tuple):
                kinds.emit_set(name, name + "=", value, path, tokens, values)
            else:
                raise InvalidEvent(
                    f"{json_kind(value)} fits no feature kind; nested objects are not read, "
                    "so flatten them into fields such as 'address.city'",
                    path=f"{path}.{name}",
                )
