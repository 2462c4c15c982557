"""Background work (snapshot captures and writes) runs on low-priority threads, one per lane."""

from __future__ import annotations

import asyncio
import os
import threading
import time

from thresher.background import NICE, in_background


def _niceness() -> int:
    return os.getpriority(os.PRIO_PROCESS, threading.get_native_id())


async def test_background_lanes_run_at_a_lower_priority_than_the_loop() -> None:
    loop_nice = _niceness()
    assert await in_background("test-capture", _niceness) == min(19, loop_nice + NICE)
    assert _niceness() == loop_nice  # the event loop's own thread is left as it was


async def test_a_lane_runs_one_call_at_a_time_and_lanes_do_not_wait_for_each_other() -> None:
    spans: dict[str, list[tuple[float, float]]] = {"slow": [], "fast": []}

    def work(lane: str, seconds: float) -> str:
        start = time.monotonic()
        time.sleep(seconds)
        spans[lane].append((start, time.monotonic()))
        return threading.current_thread().name

    names = await asyncio.gather(
        in_background("test-slow", work, "slow", 0.2),
        in_background("test-slow", work, "slow", 0.2),
        in_background("test-fast", work, "fast", 0.01),
    )
    (a0, a1), (b0, b1) = spans["slow"]
    assert b0 >= a1 or a0 >= b1  # the two calls of one lane did not overlap
    [(_, f1)] = spans["fast"]
    assert f1 < max(a1, b1) - 0.1  # the other lane's call did not queue behind both
    assert names[0] == names[1] != names[2]
