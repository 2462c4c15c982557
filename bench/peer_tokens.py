"""How a team without thresher would turn a listing into tokens: plain Python, the obvious way.

Words of the text fields (``title:word``), ``field=value`` for strings and booleans,
``field=member`` for lists, and a number as the token ``field`` weighted by its value. The
pairs feed scikit-learn's ``FeatureHasher(input_type="pair")``: plain strings cannot carry a
number's weight, and on this workload pairs hash faster than strings, so this is the peer's
better case.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import Any

TEXT_FIELDS = frozenset({"title", "description"})
_WORD = re.compile(r"\w+")


def tokens(fields: Mapping[str, Any]) -> list[tuple[str, float]]:
    """(token, value) pairs of one event's fields."""
    out: list[tuple[str, float]] = []
    for name, value in fields.items():
        if isinstance(value, str):
            if name in TEXT_FIELDS:
                out.extend((f"{name}:{word}", 1.0) for word in _WORD.findall(value.lower()))
            else:
                out.append((f"{name}={value}", 1.0))
        elif isinstance(value, bool):
            out.append((f"{name}={'true' if value else 'false'}", 1.0))
        elif isinstance(value, int | float):
            out.append((name, float(value)))
        elif isinstance(value, list):
            out.extend((f"{name}={member}", 1.0) for member in value)
    return out


def hasher(bits: int) -> Any:
    """The peer's FeatureHasher: 2**bits features, signed, as scikit-learn sets it up."""
    from sklearn.feature_extraction import FeatureHasher

    return FeatureHasher(n_features=1 << bits, input_type="pair")


def perceptron() -> Any:
    """The peer's learner: scikit-learn's Perceptron in arrival order (no shuffling)."""
    from sklearn.linear_model import Perceptron

    return Perceptron(shuffle=False, random_state=0)
