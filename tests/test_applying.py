"""Applying label records in batches against applying them one at a time, on demo traffic.

The one-at-a-time path (`Model.apply`) is the reference: a batch must leave bit-identical
weights and counters, the same applied ids and outcomes, the same drift alarms and the same
recent mistakes, explained with the weights each mistake was made with.
"""

from __future__ import annotations

import copy
import itertools
import logging
import struct
from pathlib import Path
from typing import Any

import msgpack
import pytest

from thresher import records
from thresher.demo_traffic import DEMO_MODEL, ListingTraffic
from thresher.errors import InvalidEvent
from thresher.eventcache import EventCache
from thresher.features import Featurizer
from thresher.labellog import FileLog
from thresher.lifecycle import replay
from thresher.models import Model, ModelConfig

RUN_SIZES = (1, 7, 556, 2, 2048, 3, 900, 64)


class _NoLog:
    """Records are applied directly here; nothing is appended."""

    def head(self) -> int:
        return 0


def _model(rule: str, classes: list[str], log: Any = None) -> Model:
    body: dict[str, Any] = dict(DEMO_MODEL, rule=rule, classes=classes)
    if rule == "margin":
        body["margin"] = 0.5
    if rule == "passive_aggressive":
        body["aggressiveness"] = 0.2
    model = Model(
        ModelConfig.from_json(body, created=0.0),
        log or _NoLog(),
        cache=EventCache(),
        apply_on_append=False,  # keeps per-offset outcomes, compared below
    )
    model.exclude_sources = frozenset({"bot"})
    return model


def _records(n: int, *, multi: bool) -> list[dict[str, Any]]:
    # The demo's fraud campaign changes half way, so mistakes come in bursts and drift alarms.
    traffic = ListingTraffic(seed=3, shift_at=n // 2, fraud_rate=0.25)
    out = []
    for i, (event_id, fields, label) in enumerate(traffic.batch(n)):
        if multi and label == "fine":
            label = "cheap" if fields["price"] < 150 else "dear"
        out.append(
            {
                "id": event_id if i % 5 else None,
                "label": label,
                "fields": fields,
                "source": ("mods", "bot", "mods", "queue")[i % 4],
                "served": label if i % 3 == 0 else None,
                "time": 1_000.0 + i,
            }
        )
    # What only a foreign log holds: a class this model lacks, fields its spec refuses.
    out[9]["label"] = "spam"
    out[10]["fields"] = dict(out[10]["fields"], price={"amount": 3})
    out[n - 20]["fields"] = dict(out[n - 20]["fields"], price="cheap")
    return out


def _runs(recs: list[dict[str, Any]]) -> list[list[dict[str, Any]]]:
    runs, start = [], 0
    for size in itertools.cycle(RUN_SIZES):
        if start >= len(recs):
            return runs
        runs.append(recs[start : start + size])
        start += size
    raise AssertionError("unreachable")


def _drift_messages(caplog: pytest.LogCaptureFixture) -> list[str]:
    found = [r.getMessage() for r in caplog.records if r.name == "thresher.drift"]
    caplog.clear()
    return found


def _assert_same(one: Model, batched: Model, recs_one: list[Any], recs_batched: list[Any]) -> None:
    assert batched.offset == one.offset
    assert batched.weights_digest() == one.weights_digest()
    assert batched.quality.counters_digest() == one.quality.counters_digest()
    assert batched.digest() == one.digest()
    assert batched.applied == one.applied
    assert batched.last_update == one.last_update
    assert batched._outcomes == one._outcomes
    assert [r.get("_mistake") for r in recs_batched] == [r.get("_mistake") for r in recs_one]
    assert list(batched.recent_mistakes) == list(one.recent_mistakes)


def _apply_both(
    one: Model,
    batched: Model,
    recs: list[dict[str, Any]],
    caplog: pytest.LogCaptureFixture,
    *,
    own_batch: bool = False,
) -> None:
    """Apply copies of ``recs`` to ``one`` record by record and to ``batched`` in runs (each
    with its own featurized batch when ``own_batch``); both must end the same, alarms too."""
    recs_one, recs_batched = copy.deepcopy(recs), copy.deepcopy(recs)
    with caplog.at_level(logging.WARNING, logger="thresher.drift"):
        for offset, record in enumerate(recs_one):
            one.apply(offset, record)
        alarms_one = _drift_messages(caplog)
        for run in _runs(recs_batched):
            rows = None
            if own_batch:
                rows = batched.featurizer.transform_batch([r["fields"] for r in run])
            batched.apply_batch(batched.offset, run, rows)
        alarms_batched = _drift_messages(caplog)
    _assert_same(one, batched, recs_one, recs_batched)
    assert alarms_batched == alarms_one


@pytest.mark.parametrize(
    ("rule", "classes"),
    [
        ("classic", ["fine", "fraud"]),
        ("margin", ["fine", "fraud"]),
        ("averaged", ["fine", "fraud"]),
        ("passive_aggressive", ["fine", "fraud"]),
        ("classic", ["cheap", "dear", "fraud"]),
        ("averaged", ["cheap", "dear", "fraud"]),
        ("passive_aggressive", ["cheap", "dear", "fraud"]),
    ],
)
def test_batches_equal_one_record_at_a_time(
    rule: str, classes: list[str], caplog: pytest.LogCaptureFixture
) -> None:
    recs = _records(8000, multi=len(classes) > 2)
    one, batched = _model(rule, classes), _model(rule, classes)
    _apply_both(one, batched, recs, caplog)
    assert batched.offset == len(recs)
    # The comparison reaches what it is meant to: a full list of explained mistakes, skipped
    # sources and foreign records, and mistakes made by weights a batch had moved past.
    assert len(one.recent_mistakes) == one.recent_mistakes.maxlen
    assert all(entry["top"] for entry in one.recent_mistakes)
    assert "bot" not in one.quality.by_source and one.quality.labelled < len(recs) * 3 // 4
    assert one.learner.updates > 0 and one.quality.mistakes > one.recent_mistakes.maxlen


@pytest.mark.parametrize("excluded", [frozenset(), frozenset({"bot"})])
def test_runs_given_their_own_featurized_batch_equal_one_record_at_a_time(
    excluded: frozenset[str], caplog: pytest.LogCaptureFixture
) -> None:
    # A label request hands its one featurized batch over whole (row k is the k-th record's);
    # with records it does not learn (an excluded source, a class the model lacks) the batch's
    # rows are picked, as with rows given one by one.
    recs = [r for r in _records(8000, multi=False) if type(r["fields"]["price"]) is float]
    one, batched = _model("classic", ["fine", "fraud"]), _model("classic", ["fine", "fraud"])
    one.exclude_sources = batched.exclude_sources = excluded
    _apply_both(one, batched, recs, caplog, own_batch=True)
    assert len(one.recent_mistakes) == one.recent_mistakes.maxlen


def test_recent_mistakes_of_a_long_run_use_the_weights_they_were_made_with() -> None:
    # Late in training mistakes are sparse, so the last 50 of one long run lie far apart.
    recs = _records(12000, multi=False)
    one, batched = _model("averaged", ["fine", "fraud"]), _model("averaged", ["fine", "fraud"])
    for offset, record in enumerate(recs[:6000]):
        one.apply(offset, copy.deepcopy(record))
        batched.apply(offset, copy.deepcopy(record))
    tail_one, tail_batched = copy.deepcopy(recs[6000:]), copy.deepcopy(recs[6000:])
    for offset, record in enumerate(tail_one, start=6000):
        one.apply(offset, record)
    batched.apply_batch(6000, tail_batched)
    _assert_same(one, batched, tail_one, tail_batched)
    flagged = [k for k, r in enumerate(tail_one) if r.get("_mistake")]
    last_fifty = flagged[-one.recent_mistakes.maxlen :]
    assert last_fifty[-1] - last_fifty[0] > 500


def test_payloads_apply_as_records_and_stop_at_a_corrupt_one() -> None:
    recs = _records(1200, multi=False)
    one, batched = _model("classic", ["fine", "fraud"]), _model("classic", ["fine", "fraud"])
    payloads = [records.encode(r) for r in recs]
    payloads[1000] = b"\xc1 not msgpack"
    for offset, payload in enumerate(payloads[:1000]):
        one.apply(offset, records.decode(payload))
    with pytest.raises(records.CorruptRecord):
        batched.apply_payloads(0, payloads)
    assert batched.offset == 1000
    assert batched.digest() == one.digest()
    assert list(batched.recent_mistakes) == list(one.recent_mistakes)


def test_mistakes_explained_when_read_match_those_explained_at_once() -> None:
    # Batches leave their mistakes' tokens until recent_mistakes is read; reads between runs,
    # and one-record runs that push unread batch mistakes out, must not change what is shown.
    recs = _records(6000, multi=False)
    one, batched = _model("classic", ["fine", "fraud"]), _model("classic", ["fine", "fraud"])
    recs_one, recs_batched = copy.deepcopy(recs), copy.deepcopy(recs)
    sizes, reads = itertools.cycle((900, 1, 1, 1, 1500, 30, 1, 2048)), 0
    while batched.offset < len(recs):
        start, size = batched.offset, next(sizes)
        for offset in range(start, min(start + size, len(recs))):
            one.apply(offset, recs_one[offset])
        batched.apply_batch(start, recs_batched[start : start + size])
        held = [(u.row.indices, u.row.values, u.before) for u in batched._unexplained]
        assert all(array.base is None for arrays in held for array in arrays)  # no batch kept
        if size != 1 and start % 2 == 0:
            assert list(batched.recent_mistakes) == list(one.recent_mistakes)
            assert not batched._unexplained
            reads += 1
    assert reads > 2 and list(batched.recent_mistakes) == list(one.recent_mistakes)
    assert all(entry["top"] for entry in batched.recent_mistakes)


async def test_replay_reads_segments_in_lists_and_applies_chunks_as_one_at_a_time(
    tmp_path: Path,
) -> None:
    recs = _records(3000, multi=False)
    log = await FileLog.open(tmp_path / "log", segment_bytes=64 * 1024)  # several segments
    for lo in range(0, len(recs), 250):
        await log.append([records.encode(r) for r in recs[lo : lo + 250]])
    assert log.segments > 3
    one, replayed = (
        _model("averaged", ["fine", "fraud"]),
        _model("averaged", ["fine", "fraud"], log),
    )
    for offset, record in enumerate(copy.deepcopy(recs)):
        one.apply(offset, record)
    assert await replay(replayed, chunk=700) == len(recs)
    assert replayed.offset == one.offset == len(recs)
    assert replayed.digest() == one.digest() and replayed.applied == one.applied
    assert replayed._outcomes == one._outcomes
    assert list(replayed.recent_mistakes) == list(one.recent_mistakes)
    await log.close()


def _encoded(model: Model, recs: list[dict[str, Any]], how: str) -> list[bytes]:
    """The records as a log would hold them: the old map (version 1), version 2 without a row,
    with this model's rows, with rows another featurizer made, or each in turn."""
    other = Featurizer(model.featurizer.spec, model.config.bits, seed=11, signed=True)
    other_key = records.fingerprint(
        other.spec.to_json(), bits=model.config.bits, seed=11, signed=True
    )
    out = []
    for k, record in enumerate(recs):
        way = ("v1", "v2", "rows", "foreign")[k % 4] if how == "mixed" else how
        featurizer, key = (
            (other, other_key) if way == "foreign" else (model.featurizer, model.row_key)
        )
        if way == "v1":  # the version 1 encoding, written with msgpack directly
            out.append(msgpack.packb(record, use_bin_type=True, strict_types=True))
            continue
        try:
            made = featurizer.transform(record["fields"])
        except InvalidEvent:  # a foreign log's fields: stored without a row
            way = "v2"
        if way == "v2":
            out.append(records.encode(record))
        else:
            out.append(records.encode(record, (made.indices, made.values), key))
    return out


@pytest.mark.parametrize("how", ["v1", "v2", "rows", "foreign", "mixed"])
async def test_replay_of_every_record_encoding_matches_one_at_a_time(
    tmp_path: Path, how: str
) -> None:
    recs = _records(3000, multi=False)
    one = _model("averaged", ["fine", "fraud"])
    for offset, record in enumerate(copy.deepcopy(recs)):
        one.apply(offset, record)
    log = await FileLog.open(tmp_path / "log")
    replayed = _model("averaged", ["fine", "fraud"], log)
    payloads = _encoded(replayed, recs, how)
    for lo in range(0, len(payloads), 250):
        await log.append(payloads[lo : lo + 250])
    assert await replay(replayed, chunk=700) == len(recs)
    assert replayed.digest() == one.digest() and replayed.applied == one.applied
    assert replayed._outcomes == one._outcomes
    assert list(replayed.recent_mistakes) == list(one.recent_mistakes)
    await log.close()


def test_stored_rows_are_used_and_a_foreign_key_is_featurized_again() -> None:
    recs = _records(400, multi=False)
    model = _model("classic", ["fine", "fraud"])
    decoded, error = records.decode_many(
        _encoded(model, recs, "mixed"), model.row_key, model.config.bits
    )
    assert error is None and len(decoded) == len(recs)
    for k, record in enumerate(decoded):
        if k % 4 == 2 and k not in (10, len(recs) - 20):  # this model's rows, kept as stored
            assert "fields" not in record and record["row"] is not None
            indices, values = records.row(record)
            want = model.featurizer.transform(recs[k]["fields"])
            assert indices.tolist() == want.indices.tolist()
            assert values.tolist() == want.values.tolist()
        else:  # every other record is featurized again from its fields
            assert record.get("row") is None and record["fields"] == recs[k]["fields"]


@pytest.mark.parametrize(
    "forge",
    [
        lambda ib, vb: (ib[:-4] + struct.pack("<I", 1 << 20), vb),  # index >= 2**bits
        lambda ib, vb: (ib[4:8] + ib[:4] + ib[8:], vb),  # not increasing
        lambda ib, vb: (ib[:4] + ib[:4] + ib[8:], vb),  # a repeated index
        lambda ib, vb: (ib, struct.pack("<f", float("nan")) + vb[4:]),
        lambda ib, vb: (ib, struct.pack("<f", float("inf")) + vb[4:]),
        lambda ib, vb: (ib, struct.pack("<f", 0.0) + vb[4:]),
        lambda ib, vb: (ib[:-4], vb),  # fewer indices than values
        lambda ib, vb: (ib + b"\x00", vb + b"\x00"),  # not whole elements
    ],
)
def test_a_forged_row_is_a_corrupt_record(forge: Any) -> None:
    recs = _records(1200, multi=False)
    one, batched = _model("classic", ["fine", "fraud"]), _model("classic", ["fine", "fraud"])
    payloads = _encoded(batched, recs, "rows")
    array = msgpack.unpackb(payloads[1000])
    array[8], array[9] = forge(array[8], array[9])
    payloads[1000] = msgpack.packb(array, use_bin_type=True)
    for offset, record in enumerate(copy.deepcopy(recs[:1000])):
        one.apply(offset, record)
    with pytest.raises(records.CorruptRecord):
        batched.apply_payloads(0, payloads)
    assert batched.offset == 1000
    assert batched.digest() == one.digest()
    assert list(batched.recent_mistakes) == list(one.recent_mistakes)
