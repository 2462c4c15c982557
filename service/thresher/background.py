"""Work beside the event loop that can wait: snapshot captures and writes.

`in_background(lane, fn, *args)` runs ``fn`` on the worker thread of ``lane`` at a lower
scheduling priority (nice + `NICE`, Linux per-thread), so that on a busy CPU the event loop's
thread, which answers requests, runs first. Each lane has its own thread, so that a short
capture (labels wait for it) never queues behind a long write. The work is mostly in C with
the GIL released (copies, hashing, writes), so a lower priority delays it without stalling the
loop. Where the priority cannot be lowered the thread runs at the process's own.
"""

from __future__ import annotations

import asyncio
import contextlib
import functools
import os
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any, TypeVar

NICE = 10  # added to the process's niceness for the background thread
T = TypeVar("T")


def _lower_priority() -> None:
    with contextlib.suppress(AttributeError, OSError):
        now = os.getpriority(os.PRIO_PROCESS, threading.get_native_id())
        os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), min(19, now + NICE))


@functools.cache
def _executor(lane: str) -> ThreadPoolExecutor:
    return ThreadPoolExecutor(
        max_workers=1, thread_name_prefix=f"thresher-{lane}", initializer=_lower_priority
    )


async def in_background(lane: str, fn: Callable[..., T], *args: Any) -> T:
    """``fn(*args)`` on the low-priority thread of ``lane``; a lane runs one call at a time."""
    return await asyncio.get_running_loop().run_in_executor(_executor(lane), fn, *args)
