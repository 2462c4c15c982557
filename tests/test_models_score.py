"""`Model.score`: one event takes a shorter path than a batch and must answer bit for bit alike."""

from __future__ import annotations

import asyncio
from typing import Any

import pytest

from thresher.demo_traffic import DEMO_MODEL, ListingTraffic
from thresher.errors import InvalidEvent
from thresher.eventcache import EventCache
from thresher.models import Model, ModelConfig
from thresher.scoring import GATHER_BATCH, GATHER_EVENTS


class _NoLog:
    """Records are applied directly here; nothing is appended."""

    def head(self) -> int:
        return 0


def _model(classes: list[str], rule: str) -> Model:
    body = dict(DEMO_MODEL, classes=classes, rule=rule)
    return Model(ModelConfig.from_json(body, created=0.0), _NoLog(), cache=EventCache())  # type: ignore[arg-type]


def _train(model: Model, n: int) -> list[dict[str, Any]]:
    """Teach the model n demo labels (mapped onto its classes); return 200 fresh events."""
    classes = model.config.classes
    traffic = ListingTraffic(seed=3, fraud_rate=0.3)
    for offset, (event_id, fields, label) in enumerate(traffic.batch(n)):
        # A third class, when there is one, takes the events with an even-length title.
        if len(classes) > 2 and len(str(fields.get("title", ""))) % 2 == 0:
            label = classes[2]
        record = {"id": event_id, "label": label, "fields": fields, "source": "s",
                  "served": None, "time": 1.0}  # fmt: skip
        model.apply(offset, record)
    return [{"id": f"e{i}", "fields": f} for i, (_, f, _) in enumerate(traffic.batch(200))]


@pytest.mark.parametrize(
    ("classes", "rule"),
    [
        (["fine", "fraud"], "classic"),
        (["fine", "fraud"], "averaged"),
        (["fine", "fraud", "spam"], "classic"),
        (["fine", "fraud", "spam"], "averaged"),
    ],
)
def test_one_event_scores_exactly_as_inside_a_batch(classes: list[str], rule: str) -> None:
    model = _model(classes, rule)
    events = _train(model, 1500)
    batched = model.score(events, explain=0, now=5.0)
    single = [model.score([event], explain=0, now=5.0)[0] for event in events]
    # Exact equality: the margins a client sees must not depend on how it batched its events.
    assert single == batched
    assert len({r["label"] for r in single}) > 1  # a trained model, not a constant answer
    assert model.scored == 2 * len(events)
    assert model.cache.get("e7", 6.0) is not None


def test_one_event_errors_name_the_same_paths_as_a_batch() -> None:
    model = _model(["fine", "fraud"], "classic")
    bad_kind = {"fields": {"price": "not a number", "title": "x"}}
    cases = [
        ([{"fields": {}, "extra": 1}], "events[0]"),
        ([{"fields": []}], "events[0].fields"),
        ([{"id": "", "fields": {}}], "events[0].id"),
        ([bad_kind], "events[0].fields.price"),
    ]
    for events, path in cases:
        for batch in (events, [*events, {"fields": {}}]):
            with pytest.raises(InvalidEvent) as caught:
                model.score(batch, explain=0, now=1.0)
            assert caught.value.path == path, (batch, caught.value)
    assert model.scored == 0


@pytest.mark.parametrize("classes", [["fine", "fraud"], ["fine", "fraud", "spam"]])
def test_scores_equal_the_reference_paths(classes: list[str]) -> None:
    # Scoring reads the kernels' bytes straight into lists; the numpy reference of the learner
    # and the Python featurizer must give the very same answers.
    model = _model(classes, "averaged")
    events = _train(model, 800)
    fast = model.score(events, explain=0, now=5.0)
    model.learner.native = False
    model.featurizer._native = None
    assert model.score(events, explain=0, now=5.0) == fast


def test_events_outside_the_common_shape_take_the_full_checks() -> None:
    model = _model(["fine", "fraud"], "classic")
    model.max_fields = 2

    class Name(str):
        pass

    accepted = [
        {"id": None, "fields": {"price": 1}},  # an explicit null id is no id
        {"id": Name("n1"), "fields": {"price": 1}},  # a str subclass is an id
        {"fields": {"price": 1, "title": "a"}},
    ]
    results = model.score(accepted, explain=0, now=1.0)
    assert [r["id"] for r in results] == [None, "n1", None]
    refused = [
        ({"id": "x" * 257, "fields": {}}, "events[0].id"),
        ({"id": 7, "fields": {}}, "events[0].id"),
        ({"fields": {"a": 1, "b": 2, "c": 3}}, "events[0].fields"),
        ({"fields": {}, "extra": 1}, "events[0]"),
        ({"id": "x"}, "events[0].fields"),
        ({"id": "x", "fields": {}, "extra": 1}, "events[0]"),
    ]
    for event, path in refused:
        with pytest.raises(InvalidEvent) as caught:
            model.score([event], explain=0, now=1.0)
        assert caught.value.path == path, (event, caught.value)


def _cache(model: Model) -> dict[str, Any]:
    return dict(model.cache._entries)


def test_requests_scored_together_answer_as_each_scored_alone() -> None:
    # Two models trained alike: one scores the requests together, the other one at a time.
    together, alone = (_model(["fine", "fraud", "spam"], "averaged") for _ in range(2))
    events = _train(together, 1200)
    _train(alone, 1200)
    bad_value = {"id": "bad", "fields": {"price": "not a number", "title": "x"}}
    requests: list[tuple[list[Any], int, int]] = [
        (events[0:1], 0, 300),
        (events[1:5], 3, 2000),  # explained, and a different byte charge per event
        ([{"fields": []}], 0, 40),  # refused while checking the events
        (events[5:6], 0, 250),
        ([events[6], bad_value], 0, 600),  # refused by the featurizer: the whole batch again
        (events[7:40], 0, 9000),
    ]
    outs = together.score_many(requests, 5.0)
    expected: list[Any] = []
    for events_, explain, hint in requests:
        try:
            expected.append(alone.score(events_, explain=explain, now=5.0, bytes_hint=hint))
        except InvalidEvent as error:
            expected.append(error)
    assert len(outs) == len(expected)
    for got, want in zip(outs, expected, strict=True):
        if isinstance(want, InvalidEvent):
            assert isinstance(got, InvalidEvent)
            assert (got.path, str(got)) == (want.path, str(want))
        else:
            assert got == want
    assert outs[4].path == "events[1].fields.price"  # numbered within its own request
    assert together.scored == alone.scored == 1 + 4 + 1 + 33
    assert _cache(together) == _cache(alone)  # the same entries, each charged its own bytes
    assert len({r["label"] for r in outs[5]}) > 1  # type: ignore[union-attr]


async def test_requests_gathered_in_one_loop_turn_share_one_batch() -> None:
    model = _model(["fine", "fraud"], "classic")
    events = _train(model, 1500)
    batches: list[list[int]] = []
    score_many = model.score_many

    def watched(requests: Any, now: float) -> Any:
        batches.append([len(r[0]) for r in requests])
        return score_many(requests, now)

    model.score_many = watched  # type: ignore[method-assign]
    answers = await asyncio.gather(*(model.gather([e], 0, 300) for e in events[:60]))
    assert batches == [[1] * 60]
    expected = score_many([([e], 0, 300) for e in events[:60]], 6.0)
    assert answers == expected

    # More than a batch's worth waits for the next loop turn; a big request is scored at once.
    batches.clear()
    per_batch = GATHER_BATCH // GATHER_EVENTS
    chunks = [events[k : k + GATHER_EVENTS] for k in range(0, 5 * GATHER_EVENTS, GATHER_EVENTS)]
    requests = (chunks * per_batch)[: per_batch + 3]
    answers = await asyncio.gather(*(model.gather(chunk, 0, 300) for chunk in requests))
    assert batches == [[GATHER_EVENTS] * per_batch, [GATHER_EVENTS] * 3]
    assert [len(a) for a in answers] == [GATHER_EVENTS] * (per_batch + 3)
    big = await model.gather(events[: GATHER_EVENTS + 1], 0, 300)
    assert len(big) == GATHER_EVENTS + 1 and len(batches) == 3  # score_many of one request


async def test_a_bad_request_in_a_gathered_batch_fails_alone() -> None:
    model = _model(["fine", "fraud"], "classic")
    events = _train(model, 800)
    bad = [{"fields": {"price": "not a number"}}]
    calls = [model.gather([e], 0, 300) for e in events[:5]]
    calls.insert(2, model.gather(bad, 0, 300))
    answers = await asyncio.gather(*calls, return_exceptions=True)
    assert isinstance(answers[2], InvalidEvent) and answers[2].path == "events[0].fields.price"
    good = [a for k, a in enumerate(answers) if k != 2]
    assert good == [model.score([e], explain=0, now=1.0) for e in events[:5]]


async def test_a_cancelled_request_is_left_out_of_its_batch() -> None:
    model = _model(["fine", "fraud"], "classic")
    events = _train(model, 400)
    tasks = [asyncio.ensure_future(model.gather([e], 0, 300)) for e in events[:5]]
    await asyncio.sleep(0)  # every task has queued its request; the batch runs after this
    tasks[2].cancel()
    done = await asyncio.gather(*tasks, return_exceptions=True)
    assert isinstance(done[2], asyncio.CancelledError)
    assert model.scored == 4 and events[2]["id"] not in model.cache
