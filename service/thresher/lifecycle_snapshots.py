"""A registry's snapshots, and the two ways back from a bad stretch: restore and rebuild.

:class:`Snapshotting` is the part of :class:`~thresher.lifecycle.ModelRegistry` that writes a
model's state to its snapshot store (trimming the log behind the oldest one kept), rolls a
model back to a stored generation, and relearns it from the log without chosen label sources.
With the Redis log a restore or rebuild is a control record every replica applies at its
offset (`redisswitch`). Its state is set up by ``ModelRegistry.__init__``.
"""

from __future__ import annotations

import asyncio
import functools
import logging
import time
from collections.abc import Awaitable, Callable, Iterable
from typing import TYPE_CHECKING, Any, cast

from .background import in_background
from .errors import Conflict, InvalidConfig, NotFound, Unavailable
from .models import Model
from .settings import Settings
from .snapshots import SnapshotInfo, SnapshotStore

if TYPE_CHECKING:
    from .redislog import RedisLog
    from .redisstate import RedisSnapshots, RedisState

logger = logging.getLogger("thresher.models")


# Applied ids an automatic snapshot by label count may write per label since the last one.
IDS_PER_LABEL = 8


class Snapshotting:
    """Snapshot, restore and rebuild for `ModelRegistry`, which owns the state used here."""

    settings: Settings
    clock: Callable[[], float]
    models: dict[str, Model]
    stores: dict[str, SnapshotStore]
    last_snapshot: dict[str, SnapshotInfo | None]
    _since_snapshot: dict[str, int]
    shared: RedisState | None
    get: Callable[[str], Model]
    replay: Callable[[Model], Awaitable[int]]
    _lock: Callable[[str], asyncio.Lock]

    def note_applied(self, name: str, count: int) -> bool:
        """Count applied labels; True when an automatic snapshot is due by label count.

        Due after ``snapshot_every`` labels, and not before the labels since the last snapshot
        are ``1 / IDS_PER_LABEL`` of the applied ids it will write: a snapshot holds every
        applied id (18 bytes each), so without that spacing its cost per label would grow
        with the index.
        """
        since = self._since_snapshot[name] = self._since_snapshot.get(name, 0) + count
        every = self.settings.snapshot_every
        if not every or since < every:
            return False
        model = self.models.get(name)
        return model is None or since * IDS_PER_LABEL >= len(model.applied)

    async def snapshot(self, name: str, *, automatic: bool = False) -> SnapshotInfo:
        """Write a snapshot now; the state is captured and written by worker threads."""
        model = self.get(name)
        if automatic and self.shared is not None:
            # Replicas share the snapshots: skip when another one wrote a fresh one lately.
            await asyncio.to_thread(self.stores[name].refresh)
            newest = next(iter(self.stores[name].list()), None)
            age = self.clock() - newest.time if newest is not None else 0.0
            if newest is not None and (
                newest.offset >= model.offset or age < self.settings.snapshot_interval / 2
            ):
                self.last_snapshot[name] = newest
                self._since_snapshot[name] = 0
                return newest
        self._since_snapshot[name] = 0
        state = await model.capture()
        info = await in_background(
            "snapshot-write",
            functools.partial(self.stores[name].write, offset=state["offset"], time=self.clock()),
            state,
        )
        self.last_snapshot[name] = info
        await self._trim_log(model, self.stores[name])
        return info

    async def _trim_log(self, model: Model, store: SnapshotStore) -> None:
        oldest = store.oldest_offset()
        if oldest is None:
            return
        below = max(0, oldest - self.settings.log_retain)
        await model.log.trim(below)

    def snapshots(self, name: str) -> list[SnapshotInfo]:
        self.get(name)
        return self.stores[name].list()

    async def restore(self, name: str, generation: int) -> Model:
        """Go back to a snapshot generation; labels after it are dropped from the weights.

        The restored state is written at once as a new snapshot at the current log head, so a
        restart keeps the rollback instead of replaying the dropped labels. With the Redis log
        the restore is a control record every replica applies at its offset (`redisswitch`).
        """
        model = self.get(name)
        store = self.stores[name]
        if self.shared is not None:
            await asyncio.to_thread(store.refresh)
        if not any(i.generation == generation for i in store.list()):
            raise NotFound(f"model {name!r} has no snapshot generation {generation}")
        if self.shared is not None:
            from . import redisswitch

            await self._switch(model, redisswitch.restore(generation), "restoring a snapshot")
            logger.info("model %s restored to generation %d on every replica", name, generation)
            return self.get(name)
        async with self._lock(name):
            await model.quiesce("restoring a snapshot")
            try:
                state = await asyncio.to_thread(store.load, generation)
            finally:
                model.frozen = None
            head = model.log.head()
            model.load_state(state)
            skipped = head - model.offset
            # Jump over the dropped records: they stay in the log for a later rebuild.
            model.offset = head
            await self.snapshot(name)
        logger.info(
            "model %s restored to generation %d; %d later labels dropped",
            name,
            generation,
            skipped,
        )
        return model

    async def rebuild(
        self, name: str, *, exclude_sources: Iterable[str], from_snapshot: bool = False
    ) -> Model:
        """Relearn from the log while ignoring chosen sources (a poisoned label feed)."""
        model = self.get(name)
        excluded = frozenset(exclude_sources)
        if self.shared is not None:
            control = await self._rebuild_control(name, excluded, from_snapshot)
            await self._switch(model, control, "rebuilding")
            logger.info("model %s rebuilt on every replica without %s", name, sorted(excluded))
            return self.get(name)
        async with self._lock(name):
            await model.quiesce("rebuilding")
            try:
                fresh = await self._rebuilt(model, excluded, from_snapshot)
            finally:
                model.frozen = None
            self.models[name] = fresh
            await self.snapshot(name)
        logger.info("model %s rebuilt excluding sources %s", name, sorted(excluded))
        return fresh

    async def _rebuilt(self, model: Model, excluded: frozenset[str], from_snapshot: bool) -> Model:
        name = model.name
        fresh = model.fresh()
        if from_snapshot:
            oldest = self._oldest_snapshot(name)
            fresh.load_state(await asyncio.to_thread(self.stores[name].load, oldest))
        elif model.log.first() > 0:
            raise Conflict(
                f"the log of {name!r} no longer holds labels below offset "
                f"{model.log.first()}; rebuild with from_snapshot or raise --log-retain",
                path="from_snapshot",
            )
        fresh.exclude_sources = excluded
        await self.replay(fresh)
        fresh.scored = model.scored
        fresh.duplicates = model.duplicates
        return fresh

    def _oldest_snapshot(self, name: str) -> int:
        """The generation a rebuild ``from_snapshot`` starts from: the oldest one kept."""
        infos = self.stores[name].list()
        if not infos:
            raise InvalidConfig(
                "model has no snapshot to rebuild from; rebuild from empty instead",
                path="from_snapshot",
            )
        return infos[-1].generation

    async def _rebuild_control(
        self, name: str, excluded: frozenset[str], from_snapshot: bool
    ) -> dict[str, Any]:
        from . import redisswitch

        generation = None
        if from_snapshot:
            # Fixed here, so that every replica starts from the same one.
            await asyncio.to_thread(self.stores[name].refresh)
            generation = self._oldest_snapshot(name)
        return redisswitch.rebuild(sorted(excluded), generation)

    async def _switch(self, model: Model, control: dict[str, Any], what: str) -> None:
        """Redis log: append a restore or rebuild; answer once this replica has applied it."""
        from . import redisswitch

        name = model.name
        store = cast("RedisSnapshots", self.stores[name])
        log = cast("RedisLog", model.log)
        async with self._lock(name):
            await model.quiesce(what)  # this replica's labels get 503 until it has switched
            try:
                offset = await redisswitch.append(
                    log,
                    store,
                    control,
                    model.config.classes,
                    row_key=model.row_key,
                    bits=model.config.bits,
                )
                await self._until_switched(model, log, offset, what)
            finally:
                model.frozen = None
            try:  # a restart then starts past the switch; another replica may be writing one
                await self.snapshot(name)
            except Unavailable as exc:
                logger.warning("model %s: no snapshot after %s: %s", name, what, exc)

    async def _until_switched(self, model: Model, log: RedisLog, offset: int, what: str) -> None:
        """Wait for this replica's follower to apply the record at ``offset``, for as long as
        it keeps progressing (a rebuild of many labels takes a while); 503 once it stalls."""
        from . import redisswitch

        since = time.monotonic()
        while True:
            try:
                await model.wait_applied(offset, timeout=redisswitch.APPLY_TIMEOUT)
                return
            except Unavailable:
                if self.models.get(model.name) is not model:  # deleted or created again
                    raise
                idle = time.monotonic() - max(since, log.progressed)
                if idle < redisswitch.APPLY_TIMEOUT:
                    continue
                raise Unavailable(
                    f"{what} was appended to the stream of {model.name!r} at offset {offset} "
                    "and every replica applies it there, but this one has not yet (its follower "
                    f"made no progress for {idle:.1f} s). Do not send it again: watch "
                    f"GET /api/models/{model.name} until its offset passes {offset}",
                    retry_after=5.0,
                ) from None
