"""Work the HTTP app runs beside its requests: opening the models at start-up (snapshot and
replay, while /readyz says not yet), the snapshot timer and automatic snapshots, and ending the
page's event streams at shutdown."""

from __future__ import annotations

import asyncio
import contextlib
import gc
import logging
from collections.abc import AsyncIterator, Callable

from aiohttp import web

from .errors import ThresherError
from .lifecycle import ModelRegistry

logger = logging.getLogger("thresher.http")

BACKGROUND = web.AppKey("background", list)
STOPPING = web.AppKey("stopping", asyncio.Event)


async def stop_streams(app: web.Application) -> None:
    """Ends the page's event streams at shutdown, so they do not hold it to its deadline."""
    app[STOPPING].set()


async def auto_snapshot(registry: ModelRegistry, name: str) -> None:
    """Take a snapshot of one model, logging (not raising) a failure."""
    try:
        await registry.snapshot(name, automatic=True)
    except (ThresherError, OSError) as exc:
        logger.error("automatic snapshot of %s failed: %s", name, exc)
    except KeyError:
        pass  # deleted meanwhile


async def _snapshot_timer(registry: ModelRegistry, interval: float) -> None:
    while True:
        await asyncio.sleep(interval)
        for name in registry.names():
            model = registry.models.get(name)
            info = registry.last_snapshot.get(name)
            if model is not None and (info is None or info.offset != model.offset):
                await auto_snapshot(registry, name)


def lifecycle_ctx(
    registry: ModelRegistry, *, snapshot_interval: float, freeze_gc: bool
) -> Callable[[web.Application], AsyncIterator[None]]:
    """The app's cleanup context: open the models in the background, run the snapshot timer;
    on shutdown, write final snapshots and close the logs."""

    async def ctx(app: web.Application) -> AsyncIterator[None]:
        async def start() -> None:
            try:
                await registry.open()
            except Exception:
                logger.exception("could not open the models in %s", registry.settings.data_dir)
                raise
            if freeze_gc:
                # What start-up and recovery built lives as long as the process: moved out of
                # the collector's sight, it no longer lengthens every full collection.
                gc.collect()
                gc.freeze()
            if snapshot_interval:
                timer = _snapshot_timer(registry, snapshot_interval)
                app[BACKGROUND].append(asyncio.ensure_future(timer))

        registry.lock_data_dir()  # fail the start-up at once, not in the background
        app[BACKGROUND].append(asyncio.ensure_future(start()))
        yield
        for task in app[BACKGROUND]:
            task.cancel()
        for task in app[BACKGROUND]:
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await task
        if registry.ready:
            await registry.close(snapshot=True)

    return ctx
