"""A model's definition: the create-model body validated into an immutable `ModelConfig`.

Everything here is fixed for the model's life (its hashing depends on it) and is stored beside
its data; the live state built from it is `models.Model`.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import InvalidConfig
from .features import FeatureSpec

NAME_RE = re.compile(r"^[A-Za-z0-9_-]{1,64}$")
RULES = ("classic", "margin", "averaged", "passive_aggressive")


@dataclass(frozen=True, slots=True)
class ModelConfig:
    """A model's definition; immutable once created (its hashing depends on it)."""

    name: str
    classes: tuple[str, ...]
    features: dict[str, Any] | None
    bits: int = 20
    rule: str = "classic"
    margin: float = 0.0
    aggressiveness: float = 1.0
    seed: int = 0
    signed: bool = True
    created: float = 0.0

    @classmethod
    def from_json(cls, body: Any, *, created: float) -> ModelConfig:
        """Validate a create-model body; raise InvalidConfig naming the offending field."""
        if not isinstance(body, Mapping):
            raise InvalidConfig("the model definition must be a JSON object", path="")
        allowed = {f for f in cls.__slots__ if f != "created"}  # type: ignore[attr-defined]
        for key in body:
            if key not in allowed:
                raise InvalidConfig(
                    f"unknown key {key!r}; allowed: {', '.join(sorted(allowed))}", path=key
                )
        name = body.get("name")
        if not isinstance(name, str) or not NAME_RE.match(name):
            raise InvalidConfig("name must be 1-64 letters, digits, '-' or '_'", path="name")
        classes = body.get("classes")
        if (
            not isinstance(classes, list)
            or len(classes) < 2
            or not all(isinstance(c, str) and 0 < len(c) <= 128 for c in classes)
        ):
            raise InvalidConfig(
                "classes must be a list of 2 or more label strings (for 2, the second is the "
                "positive class)",
                path="classes",
            )
        if len(set(classes)) != len(classes):
            raise InvalidConfig("classes must be distinct", path="classes")
        features = body.get("features")
        spec = FeatureSpec.from_json(features)
        bits = _int(body, "bits", 20, 10, 28)
        rule = body.get("rule", "classic")
        if rule not in RULES:
            raise InvalidConfig(f"rule must be one of {', '.join(RULES)}", path="rule")
        margin = _number(body, "margin", 0.0)
        aggressiveness = _number(body, "aggressiveness", 1.0)
        if rule == "margin" and margin <= 0:
            raise InvalidConfig("the margin rule needs margin > 0", path="margin")
        if margin < 0:
            raise InvalidConfig("margin must not be negative", path="margin")
        if aggressiveness <= 0:
            raise InvalidConfig("aggressiveness must be greater than 0", path="aggressiveness")
        seed = _int(body, "seed", 0, 0, 2**32 - 1)
        signed = body.get("signed", True)
        if not isinstance(signed, bool):
            raise InvalidConfig("signed must be true or false", path="signed")
        return cls(
            name=name,
            classes=tuple(classes),
            features=None if features is None else spec.to_json(),
            bits=bits,
            rule=rule,
            margin=margin,
            aggressiveness=aggressiveness,
            seed=seed,
            signed=signed,
            created=created,
        )

    def to_json(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "classes": list(self.classes),
            "features": self.features,
            "bits": self.bits,
            "rule": self.rule,
            "margin": self.margin,
            "aggressiveness": self.aggressiveness,
            "seed": self.seed,
            "signed": self.signed,
            "created": self.created,
        }

    @classmethod
    def from_stored(cls, data: Mapping[str, Any]) -> ModelConfig:
        created = float(data.get("created", 0.0))
        body = {k: v for k, v in data.items() if k != "created"}
        return cls.from_json(body, created=created)


def _int(body: Mapping[str, Any], key: str, default: int, lo: int, hi: int) -> int:
    value = body.get(key, default)
    if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
        raise InvalidConfig(f"{key} must be an integer from {lo} to {hi}", path=key)
    return value


def _number(body: Mapping[str, Any], key: str, default: float) -> float:
    value = body.get(key, default)
    if isinstance(value, bool) or not isinstance(value, int | float) or not np.isfinite(value):
        raise InvalidConfig(f"{key} must be a finite number", path=key)
    return float(value)
