"""Feature spec parsing and validation: the JSON a model declares its fields and crosses with.

PURE: a spec's JSON in, a frozen :class:`FeatureSpec` out, or an ``InvalidConfig`` whose
``path`` names the bad value (``features.fields.price.clip[1]``). The options of each field
kind and the spec's keys are documented on :class:`FieldSpec` and :class:`FeatureSpec`;
:mod:`thresher.features` re-exports both and turns events into tokens under them.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from .errors import InvalidConfig

KINDS = ("categorical", "text", "numeric", "set")
_OPTIONS: dict[str, tuple[str, ...]] = {
    "categorical": (),
    "text": ("ngrams", "char_ngrams"),
    "numeric": ("log1p", "clip", "buckets"),
    "set": (),
}
_SPEC_KEYS = ("fields", "crosses", "strict", "max_string_bytes", "max_tokens")
_MAX_BUCKETS = 1024


def is_number(value: Any) -> bool:
    """True for an int or a float, but not a bool (JSON numbers)."""
    return isinstance(value, int | float) and not isinstance(value, bool)


def json_kind(value: Any) -> str:
    """How a value reads in JSON terms, for error messages."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "a boolean"
    if is_number(value):
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
    if not is_number(value) or not math.isfinite(value):
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
