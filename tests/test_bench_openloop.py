"""The open-loop generator's charging rule (bench/openloop.py): queueing behind a busy
connection is charged, the client's own timer lateness on an idle connection is not."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

# The bench is a package beside tests/, run from the repository root, not an installed one.
sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
from bench.openloop import charge


def test_an_idle_connection_with_a_late_timer_is_charged_from_the_send() -> None:
    # Free since 0.0, due at 1.0, the client's timer fired 3 ms late, answered 1 ms later.
    latency, late = charge(due=1.0, free=0.0, sent=1.003, done=1.004)
    assert latency == pytest.approx(0.001)
    assert late == pytest.approx(0.003)


def test_waiting_for_a_busy_connection_is_charged() -> None:
    # Due at 1.0, but its connection was busy until 1.010 (a slow server): coordinated
    # omission must show, so the 10 ms wait counts; the 1 ms the client took after is its own.
    latency, late = charge(due=1.0, free=1.010, sent=1.011, done=1.013)
    assert latency == pytest.approx(0.010 + 0.002)
    assert late == pytest.approx(0.001)


def test_on_time_sends_are_charged_their_round_trip() -> None:
    latency, late = charge(due=2.0, free=1.5, sent=2.0, done=2.0005)
    assert latency == pytest.approx(0.0005)
    assert late == 0.0
