"""`Model.score`: one event takes a shorter path than a batch and must answer bit for bit alike."""

from __future__ import annotations

from typing import Any

import pytest

from thresher.demo_traffic import DEMO_MODEL, ListingTraffic
from thresher.errors import InvalidEvent
from thresher.eventcache import EventCache
from thresher.models import Model, ModelConfig


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
