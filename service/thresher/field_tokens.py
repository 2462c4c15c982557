"""How one field's value becomes tokens, per kind: categorical, numeric, bucket, set and text.

PURE: each ``emit_*`` appends ``(token, value)`` pairs for one field of one event to the
caller's lists and raises ``InvalidEvent`` (with the field's path) for a value its kind cannot
take, or when the event passes the spec's ``max_string_bytes`` or ``max_tokens``. The token
texts are the ones :mod:`thresher.features` documents; its :class:`~thresher.features.Featurizer`
decides which field goes to which kind, adds the bias and the crosses.
"""

from __future__ import annotations

import bisect
import math
import re
from typing import Any

from .errors import InvalidEvent
from .features_spec import FeatureSpec, FieldSpec, is_number, json_kind

# Each value stays within +-1e30 so that even max_tokens of them summed fit in float32.
_VALUE_MAX = 1e30
_WORD = re.compile(r"\w+", re.UNICODE)


class FieldTokens:
    """The per-kind token makers of one feature spec, with its string and token limits."""

    def __init__(self, spec: FeatureSpec) -> None:
        self.spec = spec
        self._short = spec.max_string_bytes // 4  # UTF-8 needs at most 4 bytes per character

    def check_count(self, tokens: list[str], path: str) -> None:
        """Refuse an event whose tokens so far pass the spec's ``max_tokens``."""
        if len(tokens) > self.spec.max_tokens:
            raise InvalidEvent(
                f"the event makes {len(tokens)} tokens, over the feature spec's max_tokens of "
                f"{self.spec.max_tokens}; shorten its text or sets, lower ngrams or char_ngrams, "
                "or raise max_tokens",
                path=path,
            )

    def check_string(self, text: str, name: str, path: str, where: str = "") -> None:
        """Refuse a string over the spec's ``max_string_bytes`` (``where`` is a member's [i])."""
        if len(text) > self._short:
            size = len(text.encode("utf-8", "surrogatepass"))
            if size > self.spec.max_string_bytes:
                raise InvalidEvent(
                    f"string of {size} UTF-8 bytes is over the feature spec's max_string_bytes "
                    f"of {self.spec.max_string_bytes}; shorten it or raise the limit",
                    path=f"{path}.{name}{where}",
                )

    def emit_categorical(
        self, name: str, prefix: str, value: Any, path: str, tokens: list[str], values: list[float]
    ) -> None:
        """Add ``prefix + value`` for a string, an integer (an integral float too) or a boolean."""
        if isinstance(value, str):
            if len(value) > self._short:
                self.check_string(value, name, path)
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
                f"{json_kind(value)} {value!r:.40}; send it as a string, or declare the field "
                "numeric",
                path=f"{path}.{name}",
            )
        values.append(1.0)

    def number(self, name: str, fs: FieldSpec, value: Any, path: str) -> float:
        """The value as a finite float, after the field's log1p, then clip."""
        if type(value) is float:
            x = value
        elif is_number(value):
            try:
                x = float(value)
            except OverflowError:
                x = math.inf
        else:
            raise InvalidEvent(
                f"a numeric field takes a number, got {json_kind(value)}; send a JSON number",
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

    def emit_numeric(
        self,
        name: str,
        fs: FieldSpec,
        value: Any,
        path: str,
        tokens: list[str],
        values: list[float],
    ) -> None:
        """Add the field's token, weighted by its transformed value."""
        x = self.number(name, fs, value, path)
        if abs(x) > _VALUE_MAX:
            raise InvalidEvent(
                f"{x!r} is beyond the feature value range of +-1e30; scale it, or set log1p, "
                "clip or buckets on the field",
                path=f"{path}.{name}",
            )
        tokens.append(name)
        values.append(x)

    def emit_bucket(
        self,
        name: str,
        arg: tuple[FieldSpec, tuple[str, ...]],
        value: Any,
        path: str,
        tokens: list[str],
        values: list[float],
    ) -> None:
        """Add the bucket token ``field@i`` of the transformed value."""
        fs, bucket_tokens = arg
        x = self.number(name, fs, value, path)
        tokens.append(bucket_tokens[bisect.bisect_right(fs.buckets, x)])  # type: ignore[arg-type]
        values.append(1.0)

    def emit_set(
        self, name: str, prefix: str, value: Any, path: str, tokens: list[str], values: list[float]
    ) -> None:
        """Add one ``prefix + member`` token per distinct member, in sorted order."""
        if not isinstance(value, list | tuple):
            raise InvalidEvent(
                f'a set field takes a list of strings, got {json_kind(value)}; send ["a", "b"]',
                path=f"{path}.{name}",
            )
        short = self._short
        for i, member in enumerate(value):
            if not isinstance(member, str):
                raise InvalidEvent(
                    f"set members must be strings, got {json_kind(member)}; send each member "
                    "as a string",
                    path=f"{path}.{name}[{i}]",
                )
            if len(member) > short:
                self.check_string(member, name, path, f"[{i}]")
        # Sorted distinct members: a set's order and repeats never change the vector.
        made = [prefix + member for member in sorted(set(value))]
        tokens += made
        values += [1.0] * len(made)
        self.check_count(tokens, f"{path}.{name}")

    def emit_text(
        self,
        name: str,
        arg: tuple[int, int, str, str],
        value: Any,
        path: str,
        tokens: list[str],
        values: list[float],
    ) -> None:
        """Add the word, word n-gram and character n-gram tokens of the lower-cased text."""
        if not isinstance(value, str):
            raise InvalidEvent(
                f"a text field takes a string, got {json_kind(value)}; send the text as a "
                "string, or declare the field numeric or categorical",
                path=f"{path}.{name}",
            )
        if len(value) > self._short:
            self.check_string(value, name, path)
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
        self.check_count(tokens, f"{path}.{name}")
