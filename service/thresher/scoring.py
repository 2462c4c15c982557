"""Scoring requests of a model: validate, featurize, score, remember the events by id.

:class:`Scoring` is the part of :class:`~thresher.models.Model` that answers ``POST /score``.
:meth:`Scoring.score_many` scores several requests as one batch: one featurizer call and one
kernel call for all their events, then each request's results and cache entries as if it had
been scored alone. A request that is invalid gets its own error and costs the others nothing.

:meth:`Scoring.gather` is the HTTP path. Under load many small requests reach a model in one
turn of the event loop; each is queued, and a callback the loop runs after that turn's handlers
scores them all with one :meth:`score_many`. Featurizing and scoring one event costs several
times its share of a batch inside a busy server (the code and the tables it reads are cold
again after every request), so gathering is what keeps one-event requests cheap. A lone
request waits for nothing but the rest of the loop turn it arrived in.
"""

from __future__ import annotations

import asyncio
import time
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from .errors import InvalidEvent, ThresherError
from .eventcache import EventCache
from .features import Featurizer
from .labelling import SharedLog, check_id
from .learner import Learner
from .model_config import ModelConfig

EXPLAIN_MAX = 50
# Requests with more events than this are batches already, scored at once. Measured in a
# loaded server: gathered, a one-event request took about 2/3 of the CPU it takes alone, and a
# request of 100 events about 10% more.
GATHER_EVENTS = 16
GATHER_BATCH = 512  # events scored by one gathered call; more wait for the next loop turn

# A request to score: its events, top-k tokens to explain, and its body's bytes (cache charge).
ScoreRequest = tuple[Sequence[Any], int, int]
Scored = list[dict[str, Any]]


class Scoring:
    """Score requests of a model; its state is set up by ``Model.__init__``."""

    config: ModelConfig
    featurizer: Featurizer
    learner: Learner
    cache: EventCache
    max_fields: int
    scored: int
    shared: SharedLog | None
    _gathered: list[tuple[ScoreRequest, asyncio.Future[Scored]]] | None

    def score(
        self, events: Sequence[Any], *, explain: int, now: float, bytes_hint: int = 0
    ) -> Scored:
        """Score a batch; remember events that carry an id for later labelling."""
        [out] = self.score_many([(events, explain, bytes_hint)], now)
        if isinstance(out, ThresherError):
            raise out
        return out

    def score_many(
        self, requests: Sequence[ScoreRequest], now: float
    ) -> list[Scored | ThresherError]:
        """Each request's results, or the error it alone would have got, scored in one batch."""
        outs: list[Scored | ThresherError | None] = []
        parsed: list[tuple[list[str | None], list[Mapping[str, Any]]]] = []
        everything: list[Mapping[str, Any]] = []
        for events, _, _ in requests:
            try:
                ids, all_fields = self._parse_events(events, "events")
            except InvalidEvent as error:
                outs.append(error)
                continue
            outs.append(None)
            parsed.append((ids, all_fields))
            everything += all_fields
        if not parsed:
            return outs  # type: ignore[return-value]
        try:
            views = self.featurizer.transform_batch_views(everything, path="events")
        except InvalidEvent as error:
            if len(parsed) == 1:  # its events are the whole batch: the error's numbering holds
                outs[outs.index(None)] = error
                return outs  # type: ignore[return-value]
            # The error names its event by its place in the whole batch: score each request
            # alone, so that the one at fault gets the error under its own numbering.
            return [self.score_many([request], now)[0] for request in requests]
        labels, margins = self.learner.score_lists(*views)
        made = iter(parsed)
        start = 0
        for k, (_, explain, bytes_hint) in enumerate(requests):
            if outs[k] is None:
                ids, all_fields = next(made)
                outs[k] = self._results(ids, all_fields, labels, margins, start, explain, now,
                                        bytes_hint)  # fmt: skip
                start += len(ids)
        return outs  # type: ignore[return-value]

    def _results(
        self,
        ids: list[str | None],
        all_fields: list[Mapping[str, Any]],
        labels: list[int],
        margins: list[float],
        start: int,
        explain: int,
        now: float,
        bytes_hint: int,
    ) -> Scored:
        """One request's results from the batch's labels and margins (its events from
        ``start``); its events with an id go to the cache, charged its bytes per event."""
        classes, rows = self.config.classes, self.learner.rows
        results: Scored = []
        remembered: list[tuple[str, Mapping[str, Any], int]] = []
        for i, event_id in enumerate(ids):
            at = start + i
            label = labels[at]
            if rows == 1:
                result: dict[str, Any] = {
                    "id": event_id,
                    "label": classes[label],
                    "margin": margins[at],
                }
            else:
                row = margins[at * rows : (at + 1) * rows]
                result = {
                    "id": event_id,
                    "label": classes[label],
                    "margin": row[label],
                    "margins": dict(zip(classes, row, strict=True)),
                }
            if explain > 0:
                result["explain"] = self.explain(all_fields[i], explain, f"events[{i}].fields")
            if event_id is not None:
                remembered.append((event_id, all_fields[i], label))
            results.append(result)
        if remembered:
            self.cache.put_many(remembered, now, max(64, bytes_hint // max(1, len(ids))))
        self.scored += len(results)
        return results

    async def gather(self, events: Sequence[Any], explain: int, bytes_hint: int) -> Scored:
        """:meth:`score`, batched with the other requests of this loop turn (module docstring)."""
        if len(events) > GATHER_EVENTS:
            return self.score(events, explain=explain, now=time.time(), bytes_hint=bytes_hint)
        loop = asyncio.get_running_loop()
        future: asyncio.Future[Scored] = loop.create_future()
        if self._gathered is None:
            self._gathered = []
            loop.call_soon(self._score_gathered)
        self._gathered.append(((events, explain, bytes_hint), future))
        return await future

    def _score_gathered(self) -> None:
        """Score the requests gathered so far (up to ``GATHER_BATCH`` events), as one batch."""
        waiting, self._gathered = self._gathered or [], None
        taken, count = [], 0
        for request, future in waiting:
            if future.done():  # its handler was cancelled
                continue
            if taken and count + len(request[0]) > GATHER_BATCH:
                if self._gathered is None:
                    self._gathered = []
                    asyncio.get_running_loop().call_soon(self._score_gathered)
                self._gathered.append((request, future))
                continue
            taken.append((request, future))
            count += len(request[0])
        if not taken:
            return
        try:
            outs = self.score_many([request for request, _ in taken], time.time())
        except Exception as error:  # a fault of ours: every waiting request reports it
            outs = [error] * len(taken)  # type: ignore[list-item]
        for (_, future), out in zip(taken, outs, strict=True):
            if future.done():
                continue
            if isinstance(out, BaseException):
                future.set_exception(out)
            else:
                future.set_result(out)

    async def share(self, events: Sequence[Any], results: Scored, now: float) -> None:
        """With a shared log, publish the scored events that carry an id, so that any replica
        can take a label for them; without one, nothing to do."""
        if self.shared is not None:
            scored = [(r["id"], events[i]["fields"], r["label"])
                      for i, r in enumerate(results) if r["id"] is not None]  # fmt: skip
            if scored:
                await self.shared.share(scored, now)

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
        max_fields = self.max_fields
        for i, event in enumerate(events):
            # The common event, checked inline: a dict with a string id (or none) and a dict of
            # fields within the limit. Anything else takes the checks below, which say why.
            if type(event) is dict and len(event) <= 2:
                event_id = event.get("id")
                fields = event.get("fields")
                if (
                    type(fields) is dict
                    and len(fields) <= max_fields
                    and len(event) == (event_id is not None) + 1
                    and (event_id is None or (type(event_id) is str and 0 < len(event_id) <= 256))
                ):
                    ids.append(event_id)
                    all_fields.append(fields)
                    continue
            where = f"{path}[{i}]"
            if type(event) is not dict and not isinstance(event, Mapping):
                raise InvalidEvent("each event must be an object with 'fields'", path=where)
            for key in event:
                if key != "id" and key != "fields":
                    extra = sorted((k for k in event if k not in ("id", "fields")), key=str)
                    raise InvalidEvent(
                        f"unknown key {extra[0]!r}; an event has 'id' and 'fields'", path=where
                    )
            ids.append(check_id(event.get("id"), f"{where}.id"))
            all_fields.append(self._fields(event.get("fields"), f"{where}.fields"))
        return ids, all_fields

    def _fields(self, fields: Any, path: str) -> Mapping[str, Any]:
        if type(fields) is not dict and not isinstance(fields, Mapping):
            raise InvalidEvent("'fields' must be an object of field name to value", path=path)
        if len(fields) > self.max_fields:
            raise InvalidEvent(
                f"{len(fields)} fields is over the limit of {self.max_fields} per event",
                path=path,
            )
        return fields
