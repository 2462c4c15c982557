"""What replicas share through Redis besides the streams: clients, models, snapshots.

`RedisState` holds one server's Redis clients and the append script, and keeps the model
directory (``thresher:models``: created here, adopted by every replica within a second).
`RedisSnapshots` stores snapshot generations as chunked strings beside the model's stream;
the key layout is in `redislog`.
"""

from __future__ import annotations

import asyncio
import json
import logging
import secrets
import time
from collections.abc import AsyncIterator, Awaitable, Callable
from pathlib import Path
from typing import Any

import msgpack
import redis
import redis.asyncio as aredis
from redis.asyncio.retry import Retry as AsyncRetry
from redis.backoff import NoBackoff
from redis.retry import Retry

from . import snapshots
from .errors import Conflict, InvalidConfig, NotFound, Unavailable
from .redisadmit import APPEND
from .redisfollow import BACKOFF_MAX, BACKOFF_MIN, BLOCK_MS, FAILURES
from .redislog import Keys, RedisLog, unavailable
from .snapshots import CorruptSnapshot, SnapshotInfo

DIRECTORY = "thresher:models"
CHUNK = 8 * 1024 * 1024  # below Redis's 512 MB string cap, small enough not to stall it
POLL_SECONDS, LOCK_MS = 1.0, 60_000  # directory polling; the snapshot writer lock's expiry
POOL_SIZE = 64  # connections for commands per server; beyond it requests queue briefly
Definitions = dict[str, tuple[dict[str, Any], str]]  # name -> (stored config, token)
Adopt = Callable[[Definitions], Awaitable[None]]

_log = logging.getLogger("thresher.redis")

# KEYS: the key. ARGV: the value it must still hold.
RELEASE = """
if redis.call('GET', KEYS[1]) == ARGV[1] then return redis.call('DEL', KEYS[1]) end
return 0
"""


class RedisState:
    """One server's link to Redis: clients, scripts, the model directory, logs and stores."""

    def __init__(
        self,
        url: str,
        *,
        wait_replicas: int = 0,
        event_ttl: float = 86_400.0,
        applied_window: int = 0,
    ) -> None:
        once = {"retry": AsyncRetry(NoBackoff(), 0), "socket_connect_timeout": 1.0}
        try:
            # No client retries: a retried append could double a label that has no id. When
            # Redis stalls (a slow fsync), requests queue for a connection, then get 503.
            pool = aredis.BlockingConnectionPool.from_url(
                url, max_connections=POOL_SIZE, timeout=2.0, socket_timeout=2.0, **once
            )
            self.client = aredis.Redis(connection_pool=pool)
            # One blocking XREAD per model is in flight at any time: no small cap here.
            self.reader = aredis.Redis.from_url(
                url, max_connections=1 << 20, socket_timeout=BLOCK_MS / 1000 + 2, **once
            )
            self.sync = redis.Redis.from_url(
                url, socket_timeout=10.0, socket_connect_timeout=1.0, retry=Retry(NoBackoff(), 0)
            )
        except ValueError as exc:
            raise InvalidConfig(f"log URL {url!r} is not a Redis URL: {exc}", path="log") from None
        self.wait_replicas = wait_replicas
        self.applied_window = applied_window  # as --applied-window; 0 keeps every id
        self.event_ttl = max(1, int(event_ttl))
        self.append = self.client.register_script(APPEND)
        self.release = self.sync.register_script(RELEASE)
        self.down_until = 0.0
        self._down = False

    def failed(self, exc: BaseException) -> None:
        """Note a failed call: shared-cache writes pause for a second; log once per outage."""
        self.down_until = time.monotonic() + 1.0
        if not self._down:
            self._down = True
            _log.warning("Redis unreachable: %s; scoring continues, labels get 503", exc)

    def up(self) -> None:
        self.down_until = 0.0
        if self._down:
            self._down = False
            _log.warning("Redis reachable again")

    # -- the model directory ----------------------------------------------------------------

    async def definitions(self) -> Definitions:
        """Every model in Redis: name -> (stored config, incarnation token)."""
        try:
            raw = await self.client.hgetall(DIRECTORY)
        except FAILURES as exc:
            self.failed(exc)
            raise unavailable(exc, "cannot read the model directory") from exc
        found = {}
        for name, entry in raw.items():
            try:
                data = json.loads(entry)
                found[name.decode()] = (dict(data["config"]), str(data["token"]))
            except (ValueError, KeyError, TypeError) as exc:
                _log.error("model directory entry %r is unreadable (%s); skipped", name, exc)
        return found

    async def token(self, name: str) -> str | None:
        """The current incarnation token of one model, None when it is not defined."""
        try:
            entry = await self.client.hget(DIRECTORY, name)
        except FAILURES as exc:
            self.failed(exc)
            raise unavailable(exc, "cannot read the model directory") from exc
        try:
            return None if entry is None else str(json.loads(entry)["token"])
        except (ValueError, KeyError, TypeError):
            return None

    async def define(self, name: str, config: dict[str, Any]) -> str:
        """Add a model to the directory; Conflict when the name is taken."""
        token = secrets.token_hex(6)
        entry = json.dumps({"config": config, "token": token})
        try:
            if not await self.client.hsetnx(DIRECTORY, name, entry):
                raise Conflict(f"a model named {name!r} already exists", path="name")
            await self.client.set(Keys(name, token).live, token)
        except FAILURES as exc:
            raise unavailable(exc, "the model was not created") from exc
        return token

    async def undefine(self, name: str, token: str) -> None:
        """Remove a model from the directory, then its keys (event keys go in batches)."""
        keys = Keys(name, token)
        client = self.client
        try:
            await client.hdel(DIRECTORY, name)
            await client.eval(RELEASE, 1, keys.live, token)
            chunks = [
                keys.chunk(int(g), i)
                for g, meta in (await client.hgetall(keys.snaps)).items()
                for i in range(int(msgpack.unpackb(meta)["chunks"]))
            ]
            await client.unlink(keys.seq, keys.stream, keys.ids, keys.previous, keys.legacy,
                                keys.snaps, keys.snapgen, keys.excluded, keys.freeze,
                                keys.staged, keys.staged_previous, keys.rebuilds, keys.switched,
                                *chunks)  # fmt: skip
            async for batch in _batches(client.scan_iter(match=keys.event("*"), count=1000)):
                await client.unlink(*batch)
        except FAILURES as exc:
            raise unavailable(exc, "the model may be partly deleted; delete it again") from exc

    async def watch(self, adopt: Adopt) -> None:
        """Poll the directory every second and hand it to ``adopt`` (models come and go)."""
        while True:
            await asyncio.sleep(POLL_SECONDS)
            try:
                await adopt(await self.definitions())
            except Unavailable:
                continue
            except Exception:  # one unloadable model must not stop the watching
                _log.exception("adopting the Redis model directory failed")

    async def until_up(self, adopt: Adopt) -> None:
        """Read the directory and adopt it, retrying with backoff while Redis is down."""
        delay = BACKOFF_MIN
        while True:
            try:
                await adopt(await self.definitions())
                return
            except Unavailable as exc:
                _log.warning("waiting for Redis: %s", exc)
                await asyncio.sleep(delay)
                delay = min(delay * 2, BACKOFF_MAX)

    async def open_log(self, name: str, token: str) -> RedisLog:
        log = RedisLog(self, name, token)
        await log.refresh()
        return log

    def store(self, name: str, token: str, *, keep: int) -> RedisSnapshots:
        return RedisSnapshots(self, Keys(name, token), keep)

    async def close(self) -> None:
        await self.client.aclose(close_connection_pool=True)  # a pool handed in stays open else
        await self.reader.aclose()
        self.sync.close()


async def _batches(items: AsyncIterator[Any], size: int = 1000) -> AsyncIterator[list[Any]]:
    batch: list[Any] = []
    async for item in items:
        batch.append(item)
        if len(batch) >= size:
            yield batch
            batch = []
    if batch:
        yield batch


class RedisSnapshots:
    """Snapshot generations as chunked Redis strings; the methods of SnapshotStore.

    Blocking (a sync client), like SnapshotStore: call the Redis-touching methods in a worker
    thread. ``list`` and ``oldest_offset`` answer from the index read last, without I/O.
    """

    def __init__(self, state: RedisState, keys: Keys, keep: int) -> None:
        self.state, self.keys, self.keep = state, keys, keep
        self._index: dict[int, tuple[SnapshotInfo, int]] = {}

    def refresh(self) -> None:
        """Read the index of generations."""
        try:
            self.adopt(self.state.sync.hgetall(self.keys.snaps))
        except FAILURES as exc:
            raise unavailable(exc, "cannot read the snapshot index") from exc

    def adopt(self, raw: dict[bytes, bytes]) -> None:
        """Take the index as read from the snapshots hash."""
        index = {}
        for g, packed in raw.items():
            try:
                meta, generation = msgpack.unpackb(packed), int(g)
                where = Path(self.keys.chunk(generation, 0))
                info = SnapshotInfo(generation, int(meta["offset"]), float(meta["time"]),
                                    int(meta["bytes"]), where)  # fmt: skip
                index[generation] = (info, int(meta["chunks"]))
            except (ValueError, KeyError, TypeError, msgpack.UnpackException):
                _log.error(
                    "snapshot index entry %r of %s is unreadable; skipped", g, self.keys.base
                )
        self._index = index

    def list(self) -> list[SnapshotInfo]:
        return [self._index[g][0] for g in sorted(self._index, reverse=True)]

    def oldest_offset(self) -> int | None:
        return min((info.offset for info, _ in self._index.values()), default=None)

    def write(self, state: dict[str, Any], *, offset: int, time: float) -> SnapshotInfo:
        """Store ``state`` as the next generation, under the writer lock; prune old ones."""
        sync, token = self.state.sync, secrets.token_hex(8)
        try:
            if not sync.set(self.keys.lock, token, nx=True, px=LOCK_MS):
                raise Unavailable(
                    "another replica is writing a snapshot of this model; retry shortly",
                    retry_after=5.0,
                )
            try:
                generation = int(sync.incr(self.keys.snapgen))
                meta = {"generation": generation, "offset": int(offset), "time": float(time)}
                data = snapshots.encode(state, meta=meta)
                count = max(1, -(-len(data) // CHUNK))
                pipe = sync.pipeline(transaction=True)  # chunks and index entry appear together
                for i in range(count):
                    pipe.set(self.keys.chunk(generation, i), data[i * CHUNK : (i + 1) * CHUNK])
                entry = {**meta, "bytes": len(data), "chunks": count}
                pipe.hset(self.keys.snaps, str(generation), msgpack.packb(entry))
                pipe.execute()
                self.refresh()
                self._prune()
            finally:
                self.state.release(keys=[self.keys.lock], args=[token])
        except FAILURES as exc:
            raise Unavailable(f"snapshot not written: Redis is unreachable ({exc})") from exc
        return self._index[generation][0]

    def _prune(self) -> None:
        """Drop all but the ``keep`` generations furthest along, and any a pending rebuild
        starts from (`redisswitch`); the rebuild record cannot be appended past a prune that
        has begun."""
        for _ in range(3):
            with self.state.sync.pipeline(transaction=True) as pipe:
                try:
                    pipe.watch(self.keys.rebuilds)
                    pinned = self._pinned(pipe.hgetall(self.keys.rebuilds))
                    ranked = sorted(
                        self._index, key=lambda g: (self._index[g][0].offset, g), reverse=True
                    )
                    doomed = [g for g in ranked[self.keep :] if g not in pinned]
                    if not doomed:
                        return
                    pipe.multi()
                    pipe.hdel(self.keys.snaps, *map(str, doomed))
                    for g in doomed:
                        pipe.delete(*(self.keys.chunk(g, i) for i in range(self._index[g][1])))
                    pipe.execute()
                except redis.WatchError:
                    continue
            for g in doomed:
                self._index.pop(g)
            return

    def _pinned(self, pending: dict[bytes, bytes]) -> set[int]:
        """The generations that rebuild records no snapshot is past yet start from."""
        covered = max((info.offset for info, _ in self._index.values()), default=-1)
        pinned = set()
        for offset, value in pending.items():
            generation = value.decode().partition(" ")[2]
            if int(offset) >= covered and generation:
                pinned.add(int(generation))
        return pinned

    def load(self, generation: int) -> dict[str, Any]:
        """The verified state of one generation."""
        if generation not in self._index:
            self.refresh()
        if generation not in self._index:
            raise NotFound(f"no snapshot generation {generation}")
        info, count = self._index[generation]
        try:
            parts = self.state.sync.mget([self.keys.chunk(generation, i) for i in range(count)])
        except FAILURES as exc:
            raise unavailable(exc, "cannot read the snapshot") from exc
        if any(p is None for p in parts):
            raise CorruptSnapshot(f"snapshot generation {generation} is missing chunks")
        meta, state = snapshots.decode_file(bytearray(b"".join(parts)))
        if meta.get("generation") != generation or meta.get("offset") != info.offset:
            raise CorruptSnapshot(f"snapshot generation {generation}: header does not match")
        return state

    def load_furthest(self, offset: int) -> tuple[dict[str, Any], SnapshotInfo] | None:
        """The verified generation furthest along, when it is at ``offset`` or past it.

        Replicas at one offset hold one state, so any generation there will do; a later
        generation can stand at an earlier offset (taken by a replica that lagged).
        """
        self.refresh()
        ranked = sorted(self._index.values(), key=lambda e: (e[0].offset, e[0].generation))
        for info, _ in reversed(ranked):
            if info.offset < offset:
                return None
            try:
                return self.load(info.generation), info
            except (CorruptSnapshot, NotFound) as exc:
                _log.error("snapshot generation %d of %s skipped: %s", info.generation,
                           self.keys.base, exc)  # fmt: skip
        return None

    def load_newest(
        self,
    ) -> tuple[dict[str, Any], SnapshotInfo, list[tuple[SnapshotInfo, str]]] | None:
        """The newest generation that verifies, with the newer ones skipped and why."""
        self.refresh()
        skipped: list[tuple[SnapshotInfo, str]] = []
        for info in self.list():
            try:
                return self.load(info.generation), info, skipped
            except CorruptSnapshot as exc:
                skipped.append((info, str(exc)))
            except NotFound:
                continue  # pruned between listing and reading
        return None
