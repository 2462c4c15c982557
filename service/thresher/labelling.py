"""A label request's way into a model: validate, dedupe, featurize, append durably, apply.

:class:`Labelling` is the part of :class:`~thresher.models.Model` that answers
``POST /labels``. All or nothing: every label is checked (and the request's fields featurized
as one batch) before anything is appended, and after the durable append the request's records
are applied in log order as one batch (:class:`~thresher.applying.Applying`). With a shared
log the log itself decides duplicates and conflicts across replicas, and each replica's
follower applies what the log holds.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, Protocol, runtime_checkable

from . import records
from .applying import Applying, BatchRow
from .errors import Conflict, InvalidEvent, Unavailable
from .eventcache import EventCache
from .features import Batch
from .labellog import LabelLog

WAIT_APPLIED_SECONDS = 10.0
LABEL_KEYS = frozenset({"id", "label", "fields"})


@runtime_checkable
class SharedLog(Protocol):
    """A log several replicas append to: it admits labels exactly once and shares events."""

    async def admit(
        self, payloads: list[bytes], keys: list[tuple[str | None, str, str]]
    ) -> tuple[int, list[int], tuple[int, str] | None]:
        """Append the new records, keyed (id, label, source): (first offset, duplicate
        positions, (position, label))."""

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


class Labelling(Applying):
    """Label requests of a model; its state is set up by ``Model.__init__``."""

    log: LabelLog
    cache: EventCache
    shared: SharedLog | None
    pending: dict[str, int]
    duplicates: int
    frozen: str | None
    inflight: int
    holds: int
    max_fields: int
    _idle: asyncio.Event
    _ready: dict[int, tuple[dict[str, Any], Any]]
    _fields: Callable[[Any, str], Mapping[str, Any]]  # Model's, shared with scoring

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
        # Every label that gets featurized, in order: position, record, fields.
        built: list[tuple[int, dict[str, Any], Mapping[str, Any]]] = []
        try:
            kept, fresh, duplicates = self._check_labels(labels, source, now, built)
        except Exception:
            # Labels are checked in order, each featurized as it passes: an invalid field in
            # an earlier label is the error to report.
            self._featurize(built)
            raise
        batch = self._featurize(built)
        self.duplicates += duplicates
        if not kept:
            return LabelAck(0, duplicates, 0, self.log.head())
        whole = len(kept) == len(built)  # no repeats: the batch's rows are the records'
        recs = [record for _, record, _ in built] if whole else [built[p][1] for p in kept]
        payloads = records.encode_many(recs, self.row_key, batch, kept)
        self.pending.update(fresh)
        try:
            if self.shared is not None:
                spots = [built[p][0] for p in kept]
                ack = await self._admit(self.shared, payloads, recs, spots, duplicates, wait)
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
            if first == self.offset and not self._ready and not self.holds:
                # The usual case: the next records in the log, nothing else waiting to apply.
                rows = batch if whole else [BatchRow(batch, p) for p in kept]
                self.apply_batch(first, recs, rows)
            else:
                for k, (record, p) in enumerate(zip(recs, kept, strict=True)):
                    self._ready[first + k] = (record, BatchRow(batch, p))
                self._drain()
        if wait or self.apply_on_append:
            await self.wait_applied(last)
        for event_id in fresh:
            self.pending.pop(event_id, None)
        mistakes: int | None = None
        if self.apply_on_append or wait:
            mistakes = len([record for record in recs if "_mistake" in record])
        return LabelAck(len(payloads), duplicates, mistakes, last + 1)

    def _featurize(self, built: list[tuple[int, dict[str, Any], Mapping[str, Any]]]) -> Batch:
        """The rows of the built records in one batch; errors name the label's own position."""
        try:
            return self.featurizer.transform_batch([fields for _, _, fields in built])
        except InvalidEvent:
            # The batch numbers events by their place in it; find the first bad one again
            # under its place in the request.
            for i, _, fields in built:
                self.featurizer.transform(fields, path=f"labels[{i}].fields")
            raise

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
        recs: list[dict[str, Any]],
        spots: list[int],
        duplicates: int,
        wait: bool,
    ) -> LabelAck:
        """Shared log: it decides duplicates and conflicts across replicas; a follower applies."""
        keys = [(record["id"], record["label"], record["source"]) for record in recs]
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
        last = first + count - 1  # the follower learns the rows the records carry
        mistakes: int | None = None
        if wait:
            await self.wait_applied(last, timeout=WAIT_APPLIED_SECONDS)
            outcomes = [self._outcomes.get(o) for o in range(first, last + 1)]
            mistakes = None if None in outcomes else sum(map(bool, outcomes))
        return LabelAck(count, duplicates, mistakes, last + 1)

    def _check_labels(
        self,
        labels: Sequence[Any],
        source: str,
        now: float,
        built: list[tuple[int, dict[str, Any], Mapping[str, Any]]],
    ) -> tuple[list[int], dict[str, int], int]:
        """Check the labels in order, appending each one that gets featurized to ``built``
        (position, record, fields): the positions in ``built`` of the records to append (their
        fields packed), the class of each id among them, and how many labels were duplicates.

        One loop over local names, without a call per label: it runs for every label.
        """
        kept: list[int] = []
        fresh: dict[str, int] = {}
        duplicates = 0
        pack = records.raw_fields_packer()
        class_index, classes, max_fields = self.class_index, self.config.classes, self.max_fields
        applied, pending, cached_event = self.applied.get, self.pending.get, self.cache.get
        for i, item in enumerate(labels):
            if type(item) is not dict and not isinstance(item, Mapping):
                raise InvalidEvent("each label must be an object with 'label'", path=f"labels[{i}]")
            if not item.keys() <= LABEL_KEYS:
                extra = sorted(set(item) - LABEL_KEYS, key=str)
                raise InvalidEvent(
                    f"unknown key {extra[0]!r}; a label has 'id', 'label' and 'fields'",
                    path=f"labels[{i}]",
                )
            label = item.get("label")
            y = class_index.get(label) if isinstance(label, str) else None
            if y is None:
                raise InvalidEvent(
                    f"label must be one of {', '.join(map(repr, classes))}",
                    path=f"labels[{i}].label",
                )
            event_id = item.get("id")
            if event_id is not None and (type(event_id) is not str or not 0 < len(event_id) <= 256):
                check_id(event_id, f"labels[{i}].id")  # raises for what is not a plain id
            served = None
            fields = item.get("fields")
            if event_id is not None:
                known = applied(event_id)
                if known is None:
                    known = pending(event_id)
                if known is not None:
                    if known == y:
                        duplicates += 1
                        continue
                    raise Conflict(
                        f"id {event_id!r} was already labelled {classes[known]!r}; labels are "
                        "applied once. To correct a model, restore a snapshot or rebuild "
                        "excluding the source",
                        path=f"labels[{i}].label",
                    )
                cached = cached_event(event_id, now)
                if cached is not None:
                    served = classes[cached.served]
                    if fields is None:
                        fields = cached.fields
            if fields is None:
                raise InvalidEvent(
                    f"id {event_id!r} is not among recently scored events (it expired or was "
                    "never scored here); send the event's 'fields' with the label"
                    if event_id is not None
                    else "a label without an id must carry the event's 'fields'",
                    path=f"labels[{i}].fields",
                )
            if type(fields) is not dict or len(fields) > max_fields:  # else `_fields` passes it
                fields = self._fields(fields, f"labels[{i}].fields")
                fields = fields if type(fields) is dict else dict(fields)
            record = {"id": event_id, "label": label, "source": source, "served": served,
                      "time": now}  # fmt: skip
            built.append((i, record, fields))
            if event_id is not None:
                if event_id in fresh:
                    if fresh[event_id] != y:
                        raise Conflict(
                            f"id {event_id!r} appears twice in this request with different labels",
                            path=f"labels[{i}].label",
                        )
                    duplicates += 1
                    continue
                fresh[event_id] = y
            # Packed now, as the log stores them: later changes to the caller's map show nowhere.
            try:
                record["packed"] = pack(fields)
            except records.UNPACKABLE:
                raise InvalidEvent(
                    "the label's fields cannot be stored in the label log: integers must "
                    "fit in 64 bits; send larger numbers as strings or floats",
                    path=f"labels[{i}].fields",
                ) from None
            kept.append(len(built) - 1)
        return kept, fresh, duplicates

    def _drain(self) -> None:
        """Apply every ready record from the applied offset on, as one batch."""
        if self.holds:  # a snapshot is taking the weights; Model.resume drains again
            return
        first, recs, rows = self.offset, [], []
        while first + len(recs) in self._ready:
            record, row = self._ready.pop(first + len(recs))
            recs.append(record)
            rows.append(row)
        self.apply_batch(first, recs, rows)

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


def check_id(value: Any, path: str) -> str | None:
    """An event id as given, or InvalidEvent: a string of 1 to 256 characters, or absent."""
    if value is None:
        return None
    if not isinstance(value, str) or not 0 < len(value) <= 256:
        raise InvalidEvent("id must be a string of 1 to 256 characters", path=path)
    return value
