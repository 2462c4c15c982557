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
