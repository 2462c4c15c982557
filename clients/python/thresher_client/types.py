"""The values the client sends and receives, as frozen dataclasses built from the JSON answers."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any


@dataclass(frozen=True, slots=True)
class Event:
    """An application event to score; give it an ``id`` to label it later by id alone."""

    fields: Mapping[str, Any]
    id: str | None = None

    def to_json(self) -> dict[str, Any]:
        body: dict[str, Any] = {"fields": dict(self.fields)}
        if self.id is not None:
            body["id"] = self.id
        return body


@dataclass(frozen=True, slots=True)
class Label:
    """A correction: the true ``label`` of an event, by ``id`` and/or with its ``fields``."""

    label: str
    id: str | None = None
    fields: Mapping[str, Any] | None = None

    def to_json(self) -> dict[str, Any]:
        body: dict[str, Any] = {"label": self.label}
        if self.id is not None:
            body["id"] = self.id
        if self.fields is not None:
            body["fields"] = dict(self.fields)
        return body


@dataclass(frozen=True, slots=True)
class ExplainItem:
    """One token's part in a score: ``contribution = weight * value``."""

    token: str
    weight: float
    value: float
    contribution: float

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> ExplainItem:
        return cls(
            token=str(data["token"]),
            weight=float(data["weight"]),
            value=float(data["value"]),
            contribution=float(data["contribution"]),
        )


@dataclass(frozen=True, slots=True)
class ScoreResult:
    """The model's answer for one event; ``margins`` only for more than two classes."""

    id: str | None
    label: str
    margin: float
    margins: Mapping[str, float] | None = field(default=None, hash=False)
    explain: tuple[ExplainItem, ...] = ()

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> ScoreResult:
        margins = data.get("margins")
        return cls(
            id=data.get("id"),
            label=str(data["label"]),
            margin=float(data["margin"]),
            margins=None if margins is None else {str(k): float(v) for k, v in margins.items()},
            explain=tuple(ExplainItem.from_json(e) for e in data.get("explain") or ()),
        )


@dataclass(frozen=True, slots=True)
class LabelAck:
    """What a labels request did; ``offset`` is the log offset after its last record.

    ``mistakes`` is None when the server acknowledged durably but had not yet applied the
    labels (Redis mode without ``wait``).
    """

    applied: int
    duplicates: int
    mistakes: int | None
    offset: int

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> LabelAck:
        mistakes = data.get("mistakes")
        return cls(
            applied=int(data["applied"]),
            duplicates=int(data["duplicates"]),
            mistakes=None if mistakes is None else int(mistakes),
            offset=int(data["offset"]),
        )


@dataclass(frozen=True, slots=True)
class SnapshotInfo:
    """One snapshot generation: the log ``offset`` it covers, when (Unix seconds), its size."""

    generation: int
    offset: int
    time: float
    bytes: int

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> SnapshotInfo:
        return cls(
            generation=int(data["generation"]),
            offset=int(data["offset"]),
            time=float(data["time"]),
            bytes=int(data["bytes"]),
        )


@dataclass(frozen=True, slots=True)
class ModelInfo:
    """A model's definition and counters; everything the server sent is in ``raw``."""

    name: str
    classes: tuple[str, ...]
    bits: int
    rule: str
    labelled: int
    mistakes: int
    offset: int
    head: int
    digest: str | None
    nonzero: int
    hash_load: float
    cache_entries: int
    created: float
    snapshot: SnapshotInfo | None
    features: Mapping[str, Any] | None = field(default=None, hash=False, repr=False)
    raw: Mapping[str, Any] = field(default_factory=dict, hash=False, compare=False, repr=False)

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> ModelInfo:
        snapshot = data.get("snapshot")
        return cls(
            name=str(data["name"]),
            classes=tuple(data["classes"]),
            bits=int(data.get("bits", 0)),
            rule=str(data.get("rule", "")),
            labelled=int(data.get("labelled", 0)),
            mistakes=int(data.get("mistakes", 0)),
            offset=int(data.get("offset", 0)),
            head=int(data.get("head", 0)),
            digest=data.get("digest"),
            nonzero=int(data.get("nonzero", 0)),
            hash_load=float(data.get("hash_load", 0.0)),
            cache_entries=int(data.get("cache_entries", 0)),
            created=float(data.get("created", 0.0)),
            snapshot=None if snapshot is None else SnapshotInfo.from_json(snapshot),
            features=data.get("features"),
            raw=dict(data),
        )


@dataclass(frozen=True, slots=True)
class Mistake:
    """A recent progressive mistake: the true ``label``, what the model ``predicted``, why."""

    id: str | None
    label: str
    predicted: str
    margin: float
    source: str
    time: float | None
    top: tuple[ExplainItem, ...] = ()

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> Mistake:
        when = data.get("time")
        return cls(
            id=data.get("id"),
            label=str(data["label"]),
            predicted=str(data["predicted"]),
            margin=float(data.get("margin") or 0.0),
            source=str(data.get("source", "")),
            time=None if when is None else float(when),
            top=tuple(ExplainItem.from_json(e) for e in data.get("top") or ()),
        )


@dataclass(frozen=True, slots=True)
class Quality:
    """A model's quality report: the main figures, plus the whole report in ``raw``.

    ``mistake_rate`` maps a window name (``all``, ``last_1000``, ...) to a rate, or None when
    the window holds no labels yet; ``drift`` and ``served`` are the report's own objects.
    """

    model: str
    labelled: int
    mistakes: int
    offset: int
    mistake_rate: Mapping[str, float | None] = field(default_factory=dict, hash=False)
    drift: Mapping[str, Any] = field(default_factory=dict, hash=False)
    served: Mapping[str, Any] = field(default_factory=dict, hash=False)
    recent_mistakes: tuple[Mistake, ...] = ()
    raw: Mapping[str, Any] = field(default_factory=dict, hash=False, compare=False, repr=False)

    @classmethod
    def from_json(cls, data: Mapping[str, Any]) -> Quality:
        return cls(
            model=str(data.get("model", "")),
            labelled=int(data.get("labelled", 0)),
            mistakes=int(data.get("mistakes", 0)),
            offset=int(data.get("offset", 0)),
            mistake_rate=dict(data.get("mistake_rate") or {}),
            drift=dict(data.get("drift") or {}),
            served=dict(data.get("served") or {}),
            recent_mistakes=tuple(Mistake.from_json(m) for m in data.get("recent_mistakes") or ()),
            raw=dict(data),
        )
