"""Label requests: featurized as one batch, applied as one batch, errors where they were."""

from __future__ import annotations

from pathlib import Path
from types import MappingProxyType
from typing import Any

import pytest

from thresher import records
from thresher.demo_traffic import DEMO_MODEL, ListingTraffic
from thresher.errors import Conflict, InvalidEvent
from thresher.eventcache import EventCache
from thresher.labellog import FileLog
from thresher.lifecycle import replay
from thresher.models import Model, ModelConfig


class _NoLog:
    """The reference model applies records directly; nothing is appended."""

    def head(self) -> int:
        return 0


def _config(rule: str = "classic") -> ModelConfig:
    return ModelConfig.from_json(dict(DEMO_MODEL, rule=rule), created=0.0)


def _labels(n: int, seed: int) -> list[dict[str, Any]]:
    return [
        {"id": event_id, "label": label, "fields": fields}
        for event_id, fields, label in ListingTraffic(seed=seed, shift_at=n // 2).batch(n)
    ]


async def _model(tmp_path: Path, rule: str = "classic") -> Model:
    log = await FileLog.open(tmp_path / "log", flush="interval")
    return Model(_config(rule), log, cache=EventCache())


@pytest.mark.parametrize(
    ("bad", "path"),
    [
        # A field the spec refuses in an earlier label wins over a later label's fault.
        ({3: {"price": "abc"}, 5: {"label": "spam"}}, "labels[3].fields.price"),
        ({1: {"label": "spam"}, 3: {"price": "abc"}}, "labels[1].label"),
        ({2: {"price": [1]}, 4: {"id": "a-0"}}, "labels[2].fields.price"),
        ({4: {"price": "abc"}}, "labels[4].fields.price"),
        ({4: {"id": "a-0"}}, "labels[4].label"),
    ],
)
async def test_errors_name_the_label_in_the_request(
    tmp_path: Path, bad: dict[int, dict[str, Any]], path: str
) -> None:
    model = await _model(tmp_path)
    labels = [{"id": f"a-{i}", "label": "fine", "fields": {"title": "oak table", "price": 80}}
              for i in range(6)]  # fmt: skip
    labels[0]["label"] = "fraud"  # so an id repeated with "fine" conflicts
    for i, change in bad.items():
        for key, value in change.items():
            if key in ("label", "id"):
                labels[i][key] = value
            else:
                labels[i]["fields"][key] = value
    with pytest.raises((InvalidEvent, Conflict)) as caught:
        await model.label(labels, source="queue", now=1.0)
    assert caught.value.path == path
    assert model.log.head() == 0 and model.offset == 0 and not model.pending
    await model.log.close()


async def test_fields_outside_the_common_shape_take_the_full_checks(tmp_path: Path) -> None:
    model = await _model(tmp_path)
    model.max_fields = 2
    plain = {"title": "oak table", "price": 80}
    refused = [
        ({"title": "oak", "price": 80, "category": "home"}, "over the limit of 2"),
        (["title", "oak"], "must be an object"),
        ({"price": 2**70}, "integers must fit in 64 bits"),
    ]
    for fields, message in refused:
        labels = [{"label": "fine", "fields": plain}, {"label": "fine", "fields": fields}]
        with pytest.raises(InvalidEvent, match=message) as caught:
            await model.label(labels, source="queue", now=1.0)
        assert caught.value.path == "labels[1].fields"
    assert model.log.head() == 0 and model.offset == 0
    # A mapping that is not a dict is taken as the dict it reads as.
    ack = await model.label(
        [{"id": "m", "label": "fine", "fields": MappingProxyType(plain)}], source="q", now=1.0
    )
    assert ack.applied == 1 and model.applied["m"] == 0
    async for _, payload in model.log.read(0):
        assert records.fields(records.decode(payload)) == plain
    await model.log.close()


@pytest.mark.parametrize("rule", ["classic", "averaged", "passive_aggressive"])
async def test_label_requests_learn_as_records_applied_one_by_one(
    tmp_path: Path, rule: str
) -> None:
    model = await _model(tmp_path, rule)
    reference = Model(_config(rule), _NoLog(), cache=EventCache())  # type: ignore[arg-type]
    labels = _labels(4000, seed=6)
    labels[7]["id"] = None  # labels without an id are learned too
    sizes = [100, 1, 350, 49, 500, 100, 2900]
    acks, start, mistakes = [], 0, 0
    for size in sizes:
        ack = await model.label(labels[start : start + size], source="queue", now=2.0 + start)
        acks.append(ack)
        for label in labels[start : start + size]:
            record = {**label, "source": "queue", "served": None, "time": 2.0 + start}
            reference.apply(reference.offset, record)
            mistakes += bool(record.get("_mistake"))
        start += size
    assert [a.applied for a in acks] == sizes and sum(a.mistakes or 0 for a in acks) == mistakes
    assert model.offset == reference.offset == model.log.head() == len(labels)
    assert model.digest() == reference.digest()
    assert list(model.recent_mistakes) == list(reference.recent_mistakes)
    assert len(model.recent_mistakes) == model.recent_mistakes.maxlen
    # A retry of the whole request counts every label as a duplicate and learns nothing.
    again = await model.label(labels[200:300], source="queue", now=9.0)
    assert (again.applied, again.duplicates) == (0, 100) and model.digest() == reference.digest()
    await model.log.close()


async def test_label_requests_store_the_rows_they_made_and_replay_to_the_same_digest(
    tmp_path: Path,
) -> None:
    model = await _model(tmp_path)
    labels = _labels(1500, seed=8)
    for lo in range(0, len(labels), 300):
        await model.label(labels[lo : lo + 300], source="queue", now=3.0 + lo)
    payloads = [payload async for _, payload in model.log.read(0)]
    decoded, error = records.decode_many(payloads, model.row_key, model.config.bits)
    assert error is None and len(decoded) == len(labels)
    for record, label in zip(decoded, labels, strict=True):
        assert "fields" not in record  # left packed: the stored row is learned as it is
        indices, values = records.row(record)
        want = model.featurizer.transform(label["fields"])
        assert indices.tolist() == want.indices.tolist()
        assert values.tolist() == want.values.tolist()
        assert records.fields(record) == label["fields"]
    replayed = model.fresh()
    assert await replay(replayed) == len(labels)
    assert replayed.digest() == model.digest() and replayed.applied == model.applied
    assert list(replayed.recent_mistakes) == list(model.recent_mistakes)
    await model.log.close()
