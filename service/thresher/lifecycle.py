"""The one owner of every model's lifecycle: create, load, snapshot, restore, rebuild, delete.

On disk, per model::

    DATA_DIR/models/NAME/model.json     the definition (format-versioned, written atomically)
    DATA_DIR/models/NAME/log/           label log segments (file backend)
    DATA_DIR/models/NAME/snapshots/     snapshot generations

Start-up loads each model's newest snapshot that verifies, then replays its log from the
snapshot's offset; only then is the model (and `/readyz`) ready.

With ``--log redis://...`` the definitions, label streams and snapshots live in Redis
(`redislog`); the data directory holds only the lock, every replica adopts the models the
Redis directory lists, and a follower per model applies its stream.

Creating, loading and deleting live here; snapshot, restore and rebuild are the registry's
`lifecycle_snapshots.Snapshotting` part.
"""

from __future__ import annotations

import asyncio
import fcntl
import json
import logging
import os
import shutil
import time
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .errors import Conflict, InvalidConfig, NotFound
from .eventcache import EventCache
from .labellog import FileLog, LabelLog
from .lifecycle_snapshots import Snapshotting
from .models import Model, ModelConfig
from .settings import Settings
from .snapshots import SnapshotInfo, SnapshotStore

if TYPE_CHECKING:
    from .redisstate import RedisState

logger = logging.getLogger("thresher.models")
CONFIG_FORMAT = 1
REPLAY_CHUNK = 2048  # log records applied as one batch


class ModelRegistry(Snapshotting):
    """All models of one server, and every operation that changes which state a model has."""

    def __init__(self, settings: Settings, *, clock: Callable[[], float] = time.time) -> None:
        self.settings = settings
        self.clock = clock
        self.root = settings.data_path / "models"
        self.models: dict[str, Model] = {}
        self.stores: dict[str, SnapshotStore] = {}
        self.snapshot_fallbacks: dict[str, int] = {}
        self.last_snapshot: dict[str, SnapshotInfo | None] = {}
        self._since_snapshot: dict[str, int] = {}
        self._locks: dict[str, asyncio.Lock] = {}
        self.ready = False
        self.shared = _shared_state(settings)
        self._tokens: dict[str, str] = {}  # Redis mode: each model's incarnation token
        self._watcher: asyncio.Future[None] | None = None

    # -- start and stop --------------------------------------------------------------------

    async def open(self) -> None:
        """Load every model found in the data directory, then mark the registry ready."""
        self.lock_data_dir()
        if self.shared is not None:
            try:
                await self.shared.until_up(self._adopt)
            except asyncio.CancelledError:
                await self.close(snapshot=False)  # stopped while Redis was still down
                raise
            self._watcher = asyncio.ensure_future(self.shared.watch(self._adopt))
            self.ready = True
            return
        for path in sorted(self.root.iterdir()):
            if path.is_dir() and (path / "model.json").exists():
                config = ModelConfig.from_stored(_read_config(path / "model.json"))
                await self._load(config, path)
        self.ready = True

    def lock_data_dir(self) -> None:
        """Take the data directory for this process; Conflict if another server has it."""
        # Two servers appending to one log would corrupt it; the lock dies with the process.
        if getattr(self, "_lock_fd", None) is not None:
            return
        self.root.mkdir(parents=True, exist_ok=True)
        path = self.settings.data_path / "LOCK"
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            raise Conflict(
                f"another thresher process is using {self.settings.data_dir}; stop it or pick "
                "another --data-dir"
            ) from None
        self._lock_fd = fd

    async def close(self, *, snapshot: bool = True) -> None:
        """Write a final snapshot of each model that moved, then close every log."""
        if self._watcher is not None:
            self._watcher.cancel()
            await asyncio.gather(self._watcher, return_exceptions=True)
        for name in list(self.models):
            model = self.models[name]
            info = self.last_snapshot.get(name)
            if snapshot and (info is None or info.offset != model.offset):
                try:
                    await self.snapshot(name, automatic=True)
                except Exception:  # a failing disk must not stop the other models closing
                    logger.exception("final snapshot of %s failed", name)
            await model.log.close()
        self.models.clear()
        if self.shared is not None:
            await self.shared.close()
        fd = getattr(self, "_lock_fd", None)
        if fd is not None:
            os.close(fd)
            self._lock_fd = None

    # -- lifecycle -------------------------------------------------------------------------

    def get(self, name: str) -> Model:
        model = self.models.get(name)
        if model is None:
            raise NotFound(f"no model named {name!r}; create it with POST /api/models")
        return model

    def names(self) -> list[str]:
        return sorted(self.models)

    async def create(self, body: Any) -> Model:
        """Create a model from a validated definition; 409 when the name is taken."""
        config = ModelConfig.from_json(body, created=self.clock())
        if config.name in self.models:
            raise Conflict(f"a model named {config.name!r} already exists", path="name")
        if self.shared is not None:
            async with self._lock(config.name):  # the directory watcher waits for this load
                token = await self.shared.define(config.name, config.to_json())
                model = self.models.get(config.name) or await self._load(config, None, token)
            logger.info("created model %s in Redis", config.name)
            return model
        path = self.root / config.name
        if path.exists():
            shutil.rmtree(path)  # a half-created or half-deleted leftover with no model.json
        path.mkdir(parents=True)
        _write_config(path / "model.json", config)
        model = await self._load(config, path)
        logger.info("created model %s", config.name)
        return model

    async def delete(self, name: str) -> None:
        model = self.get(name)
        async with self._lock(name):
            if self.shared is not None:
                await self.shared.undefine(name, self._tokens[name])
                await self._unload(name)
                logger.info("deleted model %s from Redis", name)
                return
            del self.models[name]
            await model.log.close()
            path = self.root / name
            trash = self.root / f".deleted-{name}-{int(self.clock() * 1000)}"
            os.replace(path, trash)  # atomic: a crash mid-delete leaves no half model behind
            await asyncio.to_thread(shutil.rmtree, trash, True)
        logger.info("deleted model %s", name)

    async def _adopt(self, found: dict[str, tuple[dict[str, Any], str]]) -> None:
        """Redis mode: load the models the directory lists, drop those it no longer does."""
        shared = self.shared
        if shared is None:
            return
        # ``found`` may predate a create or delete made here meanwhile: check again under
        # the model's lock before acting on it.
        for name in list(self.models):
            if name not in found or found[name][1] != self._tokens.get(name):
                async with self._lock(name):
                    if await shared.token(name) != self._tokens.get(name):
                        await self._unload(name)
        for name, (stored, token) in found.items():
            if name in self.models:
                continue
            async with self._lock(name):
                if name in self.models or await shared.token(name) != token:
                    continue
                try:
                    await self._load(ModelConfig.from_stored(stored), None, token)
                except InvalidConfig as exc:
                    logger.error("model %s in the Redis directory is unusable: %s", name, exc)

    async def _unload(self, name: str) -> None:
        model = self.models.pop(name, None)
        self._tokens.pop(name, None)
        if model is not None:
            await model.log.close()

    async def _load(self, config: ModelConfig, path: Path | None, token: str = "") -> Model:
        s = self.settings
        if self.shared is None:
            where = path or self.root / config.name
            log: LabelLog = await self._open_log(config, where)
            store: Any = SnapshotStore(where / "snapshots", keep=s.snapshot_keep)
        else:
            log = shared_log = await self.shared.open_log(config.name, token)
            store = self.shared.store(config.name, token, keep=s.snapshot_keep)
        cache = EventCache(
            max_entries=s.cache_entries, max_bytes=s.cache_bytes, ttl_seconds=s.cache_ttl
        )
        model = Model(
            config,
            log,
            cache=cache,
            max_fields=s.max_fields,
            apply_on_append=self.shared is None,
            applied_window=s.applied_window or None,
        )
        self.stores[config.name] = store
        loaded = await asyncio.to_thread(store.load_newest)
        self.snapshot_fallbacks[config.name] = 0
        self.last_snapshot[config.name] = None
        if loaded is not None:
            state, info, skipped = loaded
            for bad, why in skipped:
                logger.warning(
                    "model %s: snapshot generation %d rejected (%s); using an older one",
                    config.name,
                    bad.generation,
                    why,
                )
            self.snapshot_fallbacks[config.name] = len(skipped)
            model.load_state(state)
            self.last_snapshot[config.name] = info
        if self.shared is None:
            replayed = await self.replay(model)
        else:  # the stream may hold restores and rebuilds besides labels
            replayed = await shared_log.catch_up(model, store)
        logger.info(
            "model %s ready at offset %d (%d labels replayed from the log)",
            config.name,
            model.offset,
            replayed,
        )
        self.models[config.name] = model
        self._since_snapshot[config.name] = 0
        if self.shared is not None:
            self._tokens[config.name] = token
            shared_log.follow(lambda: self.models.get(config.name), store)
        return model

    async def _open_log(self, config: ModelConfig, path: Path) -> LabelLog:
        s = self.settings
        return await FileLog.open(
            path / "log",
            flush=s.flush,
            interval_ms=s.flush_interval_ms,
            segment_bytes=s.segment_bytes,
        )

    async def replay(self, model: Model, *, chunk: int = REPLAY_CHUNK) -> int:
        """Apply every log record from the model's offset to the head, in order, in batches."""
        return await replay(model, chunk=chunk)

    def _lock(self, name: str) -> asyncio.Lock:
        return self._locks.setdefault(name, asyncio.Lock())


async def replay(model: Model, *, chunk: int = REPLAY_CHUNK) -> int:
    """Apply the model's log from its offset to the head in batches of ``chunk``; the count."""
    count = 0
    payloads: list[bytes] = []
    async for batch in model.log.read_batches(model.offset):
        payloads += batch
        while len(payloads) >= chunk:
            model.apply_payloads(model.offset, payloads[:chunk])
            count += chunk
            del payloads[:chunk]
            await asyncio.sleep(0)  # let health checks and scoring through a long replay
    model.apply_payloads(model.offset, payloads)
    return count + len(payloads)


def _shared_state(settings: Settings) -> RedisState | None:
    if settings.log == "file":
        return None
    # Imported here so that the file log needs no Redis client installed.
    from .redisstate import RedisState

    return RedisState(
        settings.log,
        wait_replicas=settings.redis_wait_replicas,
        event_ttl=settings.cache_ttl,
        applied_window=settings.applied_window,
    )


def _read_config(path: Path) -> dict[str, Any]:
    with open(path, encoding="utf-8") as handle:
        data = json.load(handle)
    if data.get("format") != CONFIG_FORMAT:
        raise InvalidConfig(f"{path}: unsupported model file format {data.get('format')!r}")
    config: dict[str, Any] = data["model"]
    return config


def _write_config(path: Path, config: ModelConfig) -> None:
    tmp = path.with_suffix(".tmp")
    with open(tmp, "w", encoding="utf-8") as handle:
        json.dump({"format": CONFIG_FORMAT, "model": config.to_json()}, handle, indent=2)
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(tmp, path)
    fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
