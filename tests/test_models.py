"""Model-level behaviour that the HTTP tests do not reach directly."""

from __future__ import annotations

import json
import logging

import pytest

from thresher.demo_traffic import DEMO_MODEL, ListingTraffic
from thresher.eventcache import EventCache
from thresher.models import Model, ModelConfig


class _NoLog:
    """Records are applied directly here; nothing is appended."""

    def head(self) -> int:
        return 0


def test_drift_alarm_logs_a_structured_event(caplog: pytest.LogCaptureFixture) -> None:
    # The demo's invented traffic changes its fraud campaign at the shift.
    model = Model(
        ModelConfig.from_json(dict(DEMO_MODEL), created=0.0),
        _NoLog(),  # type: ignore[arg-type]
        cache=EventCache(),
    )
    traffic = ListingTraffic(seed=0, shift_at=1500, fraud_rate=0.25)
    with caplog.at_level(logging.WARNING, logger="thresher.drift"):
        for offset, (event_id, fields, label) in enumerate(traffic.batch(3000)):
            record = {
                "id": event_id,
                "label": label,
                "fields": fields,
                "source": "mods",
                "served": None,
                "time": 1.0,
            }
            model.apply(offset, record)
    alarms = [r for r in caplog.records if r.name == "thresher.drift"]
    assert len(alarms) == model.quality.report()["drift"]["alarms"] >= 1
    event = json.loads(alarms[0].getMessage().split(" ", 2)[2])
    assert event["event"] == "drift_alarm" and event["model"] == "listings"
    assert event["labelled"] > 1500  # after the shift, not before


async def test_refresh_updates_the_cached_slot_count_and_digest() -> None:
    model = Model(
        ModelConfig.from_json(dict(DEMO_MODEL), created=0.0),
        _NoLog(),  # type: ignore[arg-type]
        cache=EventCache(),
    )
    traffic = ListingTraffic(seed=3)
    records = [
        {"id": i, "label": y, "fields": f, "source": "mods", "served": None, "time": 1.0}
        for i, f, y in traffic.batch(400)
    ]
    model.apply_batch(0, records[:300])
    learner = model.learner
    refreshing = model.refresh()
    # Nothing is cached yet; once refreshed, summary() reads the values the thread made.
    assert model._nonzero is None and model._weights_digest is None
    await refreshing
    assert model._nonzero is not None and model._nonzero[1] == learner.nonzero()
    assert model._weights_digest is not None and model._weights_digest[1] == learner.digest()
    assert model.holds == 0
    summary = model.summary()
    assert summary["nonzero"] == learner.nonzero()
    assert summary["weights_digest"] == learner.digest()
    # After more learning the cache is stale, and a refresh without the digest only counts.
    model.apply_batch(300, records[300:])
    await model.refresh(digest=False)
    assert model._nonzero is not None and model._nonzero[1] == learner.nonzero()
    assert model._weights_digest is not None and model._weights_digest[1] != learner.digest()
