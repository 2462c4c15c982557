"""A live model: its definition, featurizer, learner and quality counters, bound to its log.

`Model` is where a request's events become learning: it validates and featurizes, consults the
scored-event cache and the applied-id index, appends label records to the log, and applies them
to the learner strictly in log order. It never touches files or sockets itself; the log and the
snapshot store are handed in by `lifecycle.ModelRegistry`, which owns creating, loading,
snapshotting, restoring, rebuilding and deleting models.
"""

from __future__ import annotations

import asyncio
import hashlib
import json
import logging
import re
from collections import deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol, runtime_checkable

import numpy as np

from . import records
from .errors import Conflict, InvalidConfig, InvalidEvent, Unavailable
from .eventcache import EventCache
from .features import FeatureSpec, Featurizer
from .labellog import LabelLog
from .learner import Learner
from .learner_kernels import served_weights
from .quality import Quality

drift_logger = logging.getLogger("thresher.drift")
NAME_RE = re.compile(r"^[A-Za-z0-9_-]{1,64}$")
RULES = ("classic", "margin", "averaged", "passive_aggressive")
STATE_FORMAT = 1
RECENT_MISTAKES = 50
EXPLAIN_MAX = 50
OUTCOMES_KEPT = 1 << 17  # applied offsets whose mistake flag a waiting label request can read
WAIT_APPLIED_SECONDS = 10.0


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


@runtime_checkable
class SharedLog(Protocol):
    """A log several replicas append to: it admits labels exactly once and shares events."""

    async def admit(
        self, payloads: list[bytes], keys: list[tuple[str | None, str]]
    ) -> tuple[int, list[int], tuple[int, str] | None]:
        """Append the new records: (first offset, duplicate positions, (position, label))."""

    async def share(self, scored: list[tuple[str, Any, str]], now: float) -> None:
        """Publish scored events (id, fields, served label) to the other replicas."""

    async def recall(self, ids: list[str]) -> dict[str, tuple[Any, str, float]]:
        """Events scored on any replica, by id: (fields, served label, time)."""


@dataclass(slots=True)
class LabelAck:
    applied: int
    duplicates: int
    mistakes: int | None
    offset: int


class Model:
    """One model's live state. All methods run on the event loop; none blocks on I/O."""

    def __init__(
        self,
        config: ModelConfig,
        log: LabelLog,
        *,
        cache: EventCache,
        max_fields: int = 1000,
        apply_on_append: bool = True,
    ) -> None:
        self.config = config
        self.log = log
        self.cache = cache
        self.max_fields = max_fields
        # File mode applies right after the durable append; Redis mode applies what the
        # stream follower reads, so every replica applies the same records in the same order.
        self.apply_on_append = apply_on_append
        self.shared = log if isinstance(log, SharedLog) else None
        self._outcomes: dict[int, bool] = {}
        self._rows: dict[int, Any] = {}  # shared log: rows of records admitted here, by offset
        self.spec = FeatureSpec.from_json(config.features)
        self.featurizer = Featurizer(self.spec, config.bits, config.seed, config.signed)
        self.class_index = {c: i for i, c in enumerate(config.classes)}
        self.reset_learning()
        self._ready: dict[int, tuple[dict[str, Any], Any]] = {}
        self._waiters: dict[int, asyncio.Future[None]] = {}
        self.pending: dict[str, int] = {}
        self.scored = 0
        self.duplicates = 0
        self.last_update = 0.0
        self.recent_mistakes: deque[dict[str, Any]] = deque(maxlen=RECENT_MISTAKES)
        self.exclude_sources: frozenset[str] = frozenset()
        # Set while a restore or rebuild swaps the learned state: labels get 503 meanwhile.
        self.frozen: str | None = None
        self.inflight = 0
        self._idle = asyncio.Event()
        self._idle.set()

    def reset_learning(self) -> None:
        """Forget everything learned: empty weights, counters and applied ids at offset 0."""
        self.learner = Learner(
            len(self.config.classes),
            self.config.bits,
            rule=self.config.rule,
            margin=self.config.margin,
            aggressiveness=self.config.aggressiveness,
        )
        self.quality = Quality(list(self.config.classes))
        self._weights_digest: tuple[tuple[int, int, int], str] | None = None
        self.applied: dict[str, int] = {}
        self.offset = 0

    @property
    def name(self) -> str:
        return self.config.name

    # -- scoring ---------------------------------------------------------------------------

    def score(
        self, events: Sequence[Any], *, explain: int, now: float, bytes_hint: int = 0
    ) -> list[dict[str, Any]]:
        """Score a batch; remember events that carry an id for later labelling."""
        ids, all_fields = self._parse_events(events, "events")
        batch = self.featurizer.transform_batch(all_fields, path="events")
        labels, margins = self.learner.score_batch(batch.indptr, batch.indices, batch.values)
        size = max(64, bytes_hint // max(1, len(events)))
        classes = self.config.classes
        multi = len(classes) > 2
        results: list[dict[str, Any]] = []
        for i, event_id in enumerate(ids):
            label = int(labels[i])
            row = margins[i]
            result: dict[str, Any] = {
                "id": event_id,
                "label": classes[label],
                "margin": float(row[label] if multi else row[0]),
            }
            if multi:
                result["margins"] = {c: float(row[j]) for j, c in enumerate(classes)}
            if explain > 0:
                result["explain"] = self.explain(all_fields[i], explain, f"events[{i}].fields")
            if event_id is not None:
                self.cache.put(event_id, all_fields[i], label, now, size)
            results.append(result)
        self.scored += len(results)
        return results

    async def score_shared(
        self, events: Sequence[Any], *, explain: int, now: float, bytes_hint: int = 0
    ) -> list[dict[str, Any]]:
        """Score; with a shared log, also publish events with ids so any replica can label them."""
        results = self.score(events, explain=explain, now=now, bytes_hint=bytes_hint)
        if self.shared is not None:
            scored = [(r["id"], events[i]["fields"], r["label"])
                      for i, r in enumerate(results) if r["id"] is not None]  # fmt: skip
            if scored:
                await self.shared.share(scored, now)
        return results

    def explain(self, fields: Mapping[str, Any], k: int, path: str) -> list[dict[str, Any]]:
        """Top-k tokens of one event by |weight x value|, with their text."""
        row, tokens = self.featurizer.transform_with_tokens(fields, path=path)
        by_index: dict[int, str] = {}
        for token, index, _value in tokens:
            by_index.setdefault(int(index), token)
        items = self.learner.explain(row.indices, row.values, min(k, EXPLAIN_MAX))
        return [
            {
                "token": by_index.get(int(index), f"#{int(index)}"),
                "weight": float(weight),
                "value": float(row.values[np.searchsorted(row.indices, index)]),
                "contribution": float(contribution),
            }
            for index, weight, contribution in items
        ]

    def _parse_events(
        self, events: Sequence[Any], path: str
    ) -> tuple[list[str | None], list[Mapping[str, Any]]]:
        ids: list[str | None] = []
        all_fields: list[Mapping[str, Any]] = []
        for i, event in enumerate(events):
            where = f"{path}[{i}]"
            if not isinstance(event, Mapping):
                raise InvalidEvent("each event must be an object with 'fields'", path=where)
            extra = set(event) - {"id", "fields"}
            if extra:
                raise InvalidEvent(
                    f"unknown key {sorted(extra)[0]!r}; an event has 'id' and 'fields'",
                    path=where,
                )
            ids.append(_event_id(event.get("id"), f"{where}.id"))
            all_fields.append(self._fields(event.get("fields"), f"{where}.fields"))
        return ids, all_fields

    def _fields(self, fields: Any, path: str) -> Mapping[str, Any]:
        if not isinstance(fields, Mapping):
            raise InvalidEvent("'fields' must be an object of field name to value", path=path)
        if len(fields) > self.max_fields:
            raise InvalidEvent(
                f"{len(fields)} fields is over the limit of {self.max_fields} per event",
                path=path,
            )
        return fields

    # -- labelling -------------------------------------------------------------------------

    async def label(
        self, labels: Sequence[Any], *, source: str, now: float, wait: bool = False
    ) -> LabelAck:
        """Validate, dedupe, append durably, then apply in log order; all or nothing."""
        if self.frozen:
            raise Unavailable(
                f"model {self.name!r} is busy ({self.frozen}); retry shortly", retry_after=2.0
            )
        self.inflight += 1
        self._idle.clear()
        try:
            return await self._label(labels, source=source, now=now, wait=wait)
        finally:
            self.inflight -= 1
            if self.inflight == 0:
                self._idle.set()

    async def quiesce(self, reason: str) -> None:
        """Refuse new labels and wait until those in flight are applied."""
        self.frozen = reason
        await self._idle.wait()

    async def _label(
        self, labels: Sequence[Any], *, source: str, now: float, wait: bool
    ) -> LabelAck:
        if self.shared is not None:
            await self._recall(self.shared, labels)
        payloads: list[bytes] = []
        rows: list[Any] = []
        spots: list[int] = []
        fresh: dict[str, int] = {}
        duplicates = 0
        for i, item in enumerate(labels):
            where = f"labels[{i}]"
            record, row = self._label_record(item, where, source, now)
            if record is None:
                duplicates += 1
                continue
            event_id = record["id"]
            if event_id is not None:
                y = self.class_index[record["label"]]
                if event_id in fresh:
                    if fresh[event_id] != y:
                        raise Conflict(
                            f"id {event_id!r} appears twice in this request with different labels",
                            path=f"{where}.label",
                        )
                    duplicates += 1
                    continue
                fresh[event_id] = y
            payloads.append(records.encode(record))
            rows.append((record, row))
            spots.append(i)
        self.duplicates += duplicates
        if not payloads:
            return LabelAck(0, duplicates, 0, self.log.head())
        self.pending.update(fresh)
        try:
            if self.shared is not None:
                ack = await self._admit(self.shared, payloads, rows, spots, duplicates, wait)
            else:
                first = await self.log.append(payloads)
        except BaseException:
            for event_id in fresh:
                self.pending.pop(event_id, None)
            raise
        if self.shared is not None:
            for event_id in fresh:
                self.pending.pop(event_id, None)
            return ack
        last = first + len(payloads) - 1
        if self.apply_on_append:
            for k, (record, row) in enumerate(rows):
                self._ready[first + k] = (record, row)
            self._drain()
        if wait or self.apply_on_append:
            await self.wait_applied(last)
        for event_id in fresh:
            self.pending.pop(event_id, None)
        mistakes: int | None = None
        if self.apply_on_append or wait:
            mistakes = sum(1 for record, _ in rows if record.get("_mistake"))
        return LabelAck(len(payloads), duplicates, mistakes, last + 1)

    async def _recall(self, shared: SharedLog, labels: Sequence[Any]) -> None:
        """Fetch events scored on other replicas that these labels name by id alone."""
        wanted = [
            item["id"]
            for item in labels
            if isinstance(item, Mapping)
            and isinstance(item.get("id"), str)
            and item.get("fields") is None
            and item["id"] not in self.applied
            and item["id"] not in self.cache
        ]
        if not wanted:
            return
        for event_id, (fields, served, at) in (await shared.recall(wanted)).items():
            y = self.class_index.get(served)
            if y is not None:
                self.cache.put(event_id, fields, y, at)

    async def _admit(
        self,
        shared: SharedLog,
        payloads: list[bytes],
        rows: list[Any],
        spots: list[int],
        duplicates: int,
        wait: bool,
    ) -> LabelAck:
        """Shared log: it decides duplicates and conflicts across replicas; a follower applies."""
        keys = [(record["id"], record["label"]) for record, _ in rows]
        first, repeated, conflict = await shared.admit(payloads, keys)
        if conflict is not None:
            k, existing = conflict
            raise Conflict(
                f"id {keys[k][0]!r} was already labelled {existing!r} (possibly on another "
                "replica); labels are applied once",
                path=f"labels[{spots[k]}].label",
            )
        self.duplicates += len(repeated)
        duplicates += len(repeated)
        count = len(payloads) - len(repeated)
        if count == 0:
            return LabelAck(0, duplicates, 0, self.log.head())
        last = first + count - 1
        skip = set(repeated)
        kept = [row for k, (_, row) in enumerate(rows) if k not in skip]
        for offset, row in enumerate(kept, start=first):
            if offset >= self.offset:  # saves the follower featurizing them again
                self._rows[offset] = row
        mistakes: int | None = None
        if wait:
            await self.wait_applied(last, timeout=WAIT_APPLIED_SECONDS)
            outcomes = [self._outcomes.get(o) for o in range(first, last + 1)]
            mistakes = None if None in outcomes else sum(map(bool, outcomes))
        return LabelAck(count, duplicates, mistakes, last + 1)

    def _label_record(
        self, item: Any, where: str, source: str, now: float
    ) -> tuple[dict[str, Any] | None, Any]:
        if not isinstance(item, Mapping):
            raise InvalidEvent("each label must be an object with 'label'", path=where)
        extra = set(item) - {"id", "label", "fields"}
        if extra:
            raise InvalidEvent(
                f"unknown key {sorted(extra)[0]!r}; a label has 'id', 'label' and 'fields'",
                path=where,
            )
        label = item.get("label")
        if not isinstance(label, str) or label not in self.class_index:
            raise InvalidEvent(
                f"label must be one of {', '.join(map(repr, self.config.classes))}",
                path=f"{where}.label",
            )
        y = self.class_index[label]
        event_id = _event_id(item.get("id"), f"{where}.id")
        served: int | None = None
        fields = item.get("fields")
        if event_id is not None:
            known = self.applied.get(event_id, self.pending.get(event_id))
            if known is not None:
                if known == y:
                    return None, None
                raise Conflict(
                    f"id {event_id!r} was already labelled {self.config.classes[known]!r}; "
                    "labels are applied once. To correct a model, restore a snapshot or rebuild "
                    "excluding the source",
                    path=f"{where}.label",
                )
            cached = self.cache.get(event_id, now)
            if cached is not None:
                served = cached.served
                if fields is None:
                    fields = cached.fields
        if fields is None:
            raise InvalidEvent(
                f"id {event_id!r} is not among recently scored events (it expired or was never "
                "scored here); send the event's 'fields' with the label"
                if event_id is not None
                else "a label without an id must carry the event's 'fields'",
                path=f"{where}.fields",
            )
        fields = self._fields(fields, f"{where}.fields")
        row = self.featurizer.transform(fields, path=f"{where}.fields")
        record = {
            "id": event_id,
            "label": label,
            "fields": dict(fields),
            "source": source,
            "served": None if served is None else self.config.classes[served],
            "time": now,
        }
        return record, row

    def _drain(self) -> None:
        while self.offset in self._ready:
            record, row = self._ready.pop(self.offset)
            self.apply(self.offset, record, row)

    async def wait_applied(self, offset: int, timeout: float | None = None) -> None:
        """Return once the record at ``offset`` has been applied to the weights."""
        if self.offset > offset:
            return
        future = self._waiters.get(offset)
        if future is None:
            future = asyncio.get_running_loop().create_future()
            self._waiters[offset] = future
        try:
            await asyncio.wait_for(asyncio.shield(future), timeout)
        except TimeoutError:
            raise Unavailable(
                f"label accepted at offset {offset} but not yet applied on this replica",
                retry_after=1.0,
            ) from None

    def apply(self, offset: int, record: dict[str, Any], row: Any = None) -> None:
        """Apply the record at ``offset`` (must be the next one) to learner and counters."""
        if offset != self.offset:
            raise RuntimeError(f"{self.name}: applying offset {offset}, expected {self.offset}")
        self.offset = offset + 1
        if row is None and self._rows:
            row = self._rows.pop(offset, None)
        if record["source"] not in self.exclude_sources:
            self._learn(record, row)
        if not self.apply_on_append:  # the records a follower decodes are not the request's
            self._outcomes[offset] = bool(record.get("_mistake"))
            self._outcomes.pop(offset - OUTCOMES_KEPT, None)
        if self._waiters:
            for waiting in [o for o in self._waiters if o < self.offset]:
                future = self._waiters.pop(waiting)
                if not future.done():
                    future.set_result(None)

    def _learn(self, record: dict[str, Any], row: Any) -> None:
        label = record["label"]
        y = self.class_index.get(label)
        if y is None:  # a class list never changes, so only a foreign record gets here
            return
        if row is None:
            try:
                row = self.featurizer.transform(record["fields"], path="fields")
            except InvalidEvent:
                return  # accepted under the same spec, so unreachable unless the log is foreign
        # Explain a mistake with the weights that made it: gather them before the update
        # (a cheap take over this row's slots), turn them into tokens only on a mistake.
        learner = self.learner
        before = served_weights(learner.weights_, learner.accum_, row.indices, float(learner.seen))
        update = learner.update(row.indices, row.values, y)
        served = record.get("served")
        served_index = self.class_index.get(served) if served is not None else None
        alarm = self.quality.record(
            y,
            int(update.predicted),
            source=record["source"],
            served=served_index,
            time=record.get("time"),
        )
        if alarm:
            self._log_drift()
        event_id = record.get("id")
        if event_id is not None:
            self.applied[event_id] = y
        self.last_update = float(record.get("time") or 0.0)
        if update.mistake:
            record["_mistake"] = True
            top = self._explain_before(record["fields"], row, before, int(update.predicted))
            self.recent_mistakes.appendleft(self._mistake_entry(record, update, top))

    def _log_drift(self) -> None:
        report = self.quality.report()
        event = {
            "event": "drift_alarm",
            "model": self.name,
            "offset": self.offset,
            "labelled": report["labelled"],
            "mistake_rate": report["mistake_rate"],
            "alarms": report["drift"]["alarms"],
        }
        drift_logger.warning("drift alarm %s", json.dumps(event, sort_keys=True))

    def _explain_before(
        self, fields: Mapping[str, Any], row: Any, before: np.ndarray, predicted: int
    ) -> list[dict[str, Any]]:
        """Top tokens of a mistaken prediction, by |weight x value| under the weights used."""
        weights = before[predicted if before.shape[0] > 1 else 0]
        values = np.asarray(row.values, dtype=np.float64)
        contrib = weights * values
        order = np.lexsort((row.indices, -np.abs(contrib)))
        order = order[contrib[order] != 0][:5]
        if order.size == 0:
            return []
        try:
            _, tokens = self.featurizer.transform_with_tokens(fields, path="fields")
        except InvalidEvent:
            return []
        names: dict[int, str] = {}
        for token, index, _value in tokens:
            names.setdefault(int(index), token)
        return [
            {
                "token": names.get(int(row.indices[i]), f"#{int(row.indices[i])}"),
                "weight": float(weights[i]),
                "value": float(values[i]),
                "contribution": float(contrib[i]),
            }
            for i in order
        ]

    def _mistake_entry(
        self, record: dict[str, Any], update: Any, top: list[dict[str, Any]]
    ) -> dict[str, Any]:
        predicted = int(update.predicted)
        margins = np.asarray(update.margins, dtype=np.float64)
        margin = float(margins[predicted] if margins.size > 1 else margins[0])
        return {
            "id": record.get("id"),
            "label": record["label"],
            "predicted": self.config.classes[predicted],
            "margin": margin,
            "source": record["source"],
            "time": record.get("time"),
            "top": top,
        }

    # -- state -----------------------------------------------------------------------------

    def state(self) -> dict[str, Any]:
        """Everything a snapshot holds; arrays are copies, safe to write from a thread."""
        learner_state = {
            k: (v.copy() if isinstance(v, np.ndarray) else v)
            for k, v in self.learner.state().items()
        }
        return {
            "format": STATE_FORMAT,
            "config": self.config.to_json(),
            "offset": self.offset,
            "learner": learner_state,
            "quality": self.quality.state(),
            "applied": dict(self.applied),
            "excluded": sorted(self.exclude_sources),
            "scored": self.scored,
            "duplicates": self.duplicates,
            "last_update": self.last_update,
        }

    def load_state(self, state: Mapping[str, Any]) -> None:
        """Replace the learned state with a snapshot's."""
        if state.get("format") != STATE_FORMAT:
            raise InvalidConfig(f"snapshot format {state.get('format')!r} is not supported")
        self.learner = Learner.from_state(state["learner"])
        self._weights_digest = None
        self.quality = Quality.from_state(state["quality"])
        self.applied = {str(k): int(v) for k, v in state["applied"].items()}
        self.offset = int(state["offset"])
        self.exclude_sources = frozenset(state.get("excluded", ()))
        self.scored = int(state.get("scored", 0))
        self.duplicates = int(state.get("duplicates", 0))
        self.last_update = float(state.get("last_update", 0.0))

    def weights_digest(self) -> str:
        """The learner's digest, hashed again only after the weights can have changed."""
        learner = self.learner
        # Weights change only through update calls, which move `seen`; a restore or rebuild
        # installs a new learner object.
        key = (id(learner), learner.seen, learner.updates)
        cached = self._weights_digest
        if cached is None or cached[0] != key:
            cached = (key, learner.digest())
            self._weights_digest = cached
        return cached[1]

    def digest(self) -> str:
        """SHA-256 of the weights and the deterministic counters: equal means identical."""
        h = hashlib.sha256()
        h.update(self.weights_digest().encode())
        h.update(self.quality.counters_digest().encode())
        return h.hexdigest()

    def summary(self) -> dict[str, Any]:
        report = self.config.to_json()
        nonzero = int(self.learner.nonzero())
        report.update(
            labelled=int(self.quality.labelled),
            mistakes=int(self.quality.mistakes),
            scored=self.scored,
            duplicates=self.duplicates,
            offset=self.offset,
            head=self.log.head(),
            digest=self.digest(),
            weights_digest=self.weights_digest(),
            nonzero=nonzero,
            hash_load=nonzero / float(1 << self.config.bits),
            cache_entries=len(self.cache),
            last_update=self.last_update or None,
            excluded_sources=sorted(self.exclude_sources),
        )
        return report


def _event_id(value: Any, path: str) -> str | None:
    if value is None:
        return None
    if not isinstance(value, str) or not 0 < len(value) <= 256:
        raise InvalidEvent("id must be a string of 1 to 256 characters", path=path)
    return value
