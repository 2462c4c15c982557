"""Restore and rebuild with the Redis log: a control record switches every replica at one offset.

A restore or rebuild is appended to the model's stream as a *control record* (entry field
``c``; labels use ``d``), so it takes the next dense offset like a label. Every replica's
follower, on reaching it, makes the same deterministic change there:

- ``{"control": "restore", "generation": g}``: load snapshot g's learned state. The labels
  between its offset and the control record are dropped from the learned state.
- ``{"control": "rebuild", "generation": g or None, "exclude_sources": [...]}``: start from
  snapshot g (None: from nothing) and apply the stream's label records from there up to the
  control record, skipping the excluded sources and any earlier control record, as a rebuild
  over the file log replays every label the log holds.

The same script that appends the record resets the shared id hashes (both generations under
--applied-window) to the ids the switched state holds, as every follower's `AppliedIds` will
hold them there, and the set of excluded sources the append script consults, so an id whose
label was rolled back can be labelled again. While the replica that took the request
computes that hash, a *freeze* key makes the append script refuse labels (503), so the head
of the stream stays where the computation read it. The freeze is renewed while that
computation makes progress, so a rebuild over millions of labels is not cut off by its expiry,
which is there only for a replica that dies or stalls mid-request.

A rebuild record also enters a small hash of *pending rebuilds* (offset -> the offset and
generation it starts from) until a snapshot past it exists. Trimming never drops what a
pending rebuild still reads, and pruning never drops the generation it starts from, so a
replica that lags behind the record can always make the switch itself.
"""

from __future__ import annotations

import asyncio
import gc
import logging
import secrets
import time
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

import msgpack

from . import records
from .appliedids import AppliedIds
from .errors import Conflict, NotFound, Unavailable
from .labellog import OffsetOutOfRange
from .redislog import FAILURES, unavailable
from .snapshots import CorruptSnapshot

if TYPE_CHECKING:
    from .models import Model
    from .redislog import RedisLog
    from .redisstate import RedisSnapshots

FREEZE_MS = 60_000  # labels are refused at most this long past a preparation's last progress
APPLY_TIMEOUT = 30.0  # seconds the requesting replica waits for its follower to progress
STAGE, REPLAY = 1000, 2048  # ids per HSET, labels per batch
STAGE_PIPELINE = 5  # HSETs per round trip
ADMITTED, TRIMMED, GONE, FROZEN, PRUNED = 0, 1, 2, 3, 4  # the first element of the answer

_log = logging.getLogger("thresher.redis")

# KEYS: seq, stream, ids, live, freeze, staged ids, excluded sources, previous ids, staged
# previous ids, legacy raw ids (dropped: the staged hashes hold every id the switch leaves),
# pending rebuilds, snapshot index, last control offset.
# ARGV: token, freeze mark, control payload, lowest offset the stream must still hold (-1:
# none, a restore), the generation the record names ('' for none), then the excluded sources.
CONTROL = """
if redis.call('GET', KEYS[4]) ~= ARGV[1] then return {2} end
if redis.call('GET', KEYS[5]) ~= ARGV[2] then return {3} end
if ARGV[5] ~= '' and redis.call('HEXISTS', KEYS[12], ARGV[5]) == 0 then
  redis.call('DEL', KEYS[5], KEYS[6], KEYS[9])
  return {4}
end
local need = tonumber(ARGV[4])
if need >= 0 then
  local first = tonumber(redis.call('GET', KEYS[1]) or '0')
  local oldest = redis.call('XRANGE', KEYS[2], '-', '+', 'COUNT', 1)
  if #oldest > 0 then first = tonumber(string.match(oldest[1][1], '%-(%d+)$')) - 1 end
  if first > need then
    redis.call('DEL', KEYS[5], KEYS[6], KEYS[9])
    return {1, first}
  end
end
for _, k in ipairs({{6, 3}, {9, 8}}) do
  if redis.call('EXISTS', KEYS[k[1]]) == 1 then
    redis.call('RENAME', KEYS[k[1]], KEYS[k[2]])
  else
    redis.call('DEL', KEYS[k[2]])
  end
end
redis.call('DEL', KEYS[7], KEYS[10])
for i = 6, #ARGV do redis.call('SADD', KEYS[7], ARGV[i]) end
local seq = redis.call('INCR', KEYS[1])
redis.call('XADD', KEYS[2], '0-' .. seq, 'c', ARGV[3])
if need >= 0 then redis.call('HSET', KEYS[11], seq - 1, need .. ' ' .. ARGV[5]) end
redis.call('SET', KEYS[13], seq - 1)
redis.call('DEL', KEYS[5])
return {0, seq - 1}
"""

# KEYS: freeze, staged, staged previous. ARGV: the freeze mark; drops them only while the mark
# is ours.
THAW = """
if redis.call('GET', KEYS[1]) == ARGV[1] then
  return redis.call('DEL', KEYS[1], KEYS[2], KEYS[3])
end
return 0
"""

# KEYS: freeze. ARGV: the freeze mark, its new expiry in ms; only while the mark is ours.
RENEW = """
if redis.call('GET', KEYS[1]) == ARGV[1] then
  return redis.call('PEXPIRE', KEYS[1], ARGV[2])
end
return 0
"""


class Freeze:
    """The freeze key of one preparation, renewed while the preparation shows progress.

    `tick` marks progress. Every third of `FREEZE_MS` the key's expiry is pushed out again if
    the last tick is less than `FREEZE_MS` old; a preparation that stalls (or a replica that
    dies) lets it lapse, and the control script then refuses the stale request.
    """

    def __init__(self, log: RedisLog, mark: str) -> None:
        self.log, self.mark = log, mark
        self.last = time.monotonic()
        self.renewals = 0

    def tick(self) -> None:
        self.last = time.monotonic()

    async def keep(self) -> None:
        client, key = self.log.state.client, self.log.keys.freeze
        while True:
            await asyncio.sleep(FREEZE_MS / 3000)
            if time.monotonic() - self.last >= FREEZE_MS / 1000:
                continue  # no progress lately: let it lapse
            try:
                if await client.eval(RENEW, 1, key, self.mark, FREEZE_MS):
                    self.renewals += 1
            except FAILURES as exc:
                self.log.state.failed(exc)  # the preparation's own calls fail and report it


def restore(generation: int) -> dict[str, Any]:
    return {"control": "restore", "generation": generation}


def rebuild(exclude_sources: Sequence[str], generation: int | None) -> dict[str, Any]:
    return {
        "control": "rebuild",
        "generation": generation,
        "exclude_sources": sorted(exclude_sources),
    }


async def append(
    log: RedisLog,
    store: RedisSnapshots,
    control: dict[str, Any],
    classes: Sequence[str],
    *,
    row_key: bytes = b"",
    bits: int = 0,
) -> int:
    """Append a control record with the applied ids it leaves, atomically; its offset.

    ``row_key`` and ``bits`` are the model's (`Model.row_key`, its config's bits): records
    made under that key are read without unpacking their fields.
    """
    client, keys, mark = log.state.client, log.keys, secrets.token_hex(8)
    freeze = Freeze(log, mark)
    try:
        if not await client.set(keys.freeze, mark, nx=True, px=FREEZE_MS):
            raise Unavailable(
                f"another restore or rebuild of model {log.name!r} is being appended; retry "
                "shortly",
                retry_after=2.0,
            )
        keeper = asyncio.get_running_loop().create_task(freeze.keep())
        try:
            applied, excluded, need = await _target(
                log, store, control, classes, row_key=row_key, bits=bits, tick=freeze.tick
            )
            await _stage(log, applied, classes, freeze.tick)
            ks = [
                keys.seq,
                keys.stream,
                keys.ids,
                keys.live,
                keys.freeze,
                keys.staged,
                keys.excluded,
                keys.previous,
                keys.staged_previous,
                keys.legacy,
                keys.rebuilds,
                keys.snaps,
                keys.switched,
            ]
            payload = msgpack.packb(control, use_bin_type=True)
            generation = "" if control["generation"] is None else str(control["generation"])
            reply = await client.eval(
                CONTROL, len(ks), *ks, log.token, mark, payload, need, generation, *excluded
            )
        except BaseException:
            await client.eval(THAW, 3, keys.freeze, keys.staged, keys.staged_previous, mark)
            raise
        finally:
            keeper.cancel()
    except FAILURES as exc:
        log.state.failed(exc)
        raise unavailable(exc, "nothing was appended; the model is unchanged") from exc
    code = int(reply[0])
    if code == GONE:
        raise NotFound(f"model {log.name!r} was deleted on another replica")
    if code == FROZEN:
        raise Unavailable(
            f"the restore or rebuild of model {log.name!r} made no progress for "
            f"{FREEZE_MS / 1000:g} s while it was prepared and was not appended; retry",
            retry_after=2.0,
        )
    if code == PRUNED:
        raise NotFound(
            f"snapshot generation {control['generation']} of model {log.name!r} was pruned "
            "while the request was prepared; choose another"
        )
    if code == TRIMMED:
        raise _trimmed(log.name, int(reply[1]))
    offset = int(reply[1])
    log.saw(offset + 1)
    if freeze.renewals:
        _log.info(
            "model %s: %s prepared in %d freeze renewals", log.name, control["control"],
            freeze.renewals,
        )  # fmt: skip
    return offset


async def _stage(
    log: RedisLog, applied: AppliedIds, classes: Sequence[str], tick: Callable[[], None]
) -> None:
    """Write the ids the switch leaves to the staged hashes, a few HSETs per round trip."""
    client, keys = log.state.client, log.keys
    await client.delete(keys.staged, keys.staged_previous)
    names = [c.encode() for c in classes]
    for where, table in zip([keys.staged, keys.staged_previous], applied.tables(), strict=False):
        ids, ys = table.keys()
        step = STAGE * STAGE_PIPELINE
        for k in range(0, len(ids), step):
            async with client.pipeline(transaction=False) as pipe:
                for j in range(k, min(k + step, len(ids)), STAGE):
                    part = zip(ids[j : j + STAGE], ys[j : j + STAGE], strict=True)
                    pipe.hset(where, mapping={i: names[y] for i, y in part})
                await pipe.execute()
            tick()


async def apply(
    log: RedisLog, model: Model, offset: int, raw: bytes, store: RedisSnapshots
) -> None:
    """Make the change the control record at ``offset`` asks for; the model moves past it."""
    control = msgpack.unpackb(raw, raw=False)
    kind, generation = control.get("control"), control.get("generation")
    log.progress()
    try:
        if kind == "restore":
            state = await asyncio.to_thread(store.load, int(generation))
            await model.until_resumed()  # not while a snapshot is taking the weights
            model.load_state(state)
        elif kind == "rebuild":
            fresh = await _rebuilt(log, model, offset, control, store)
            await model.until_resumed()
            model.adopt(fresh)
        else:
            raise ValueError(f"unknown control record {kind!r}; is this replica out of date?")
    except (NotFound, CorruptSnapshot, OffsetOutOfRange) as exc:
        # Pruned or trimmed since it was appended: a snapshot past it holds the outcome.
        if not await _skip_past(log, model, offset, store):
            raise
        log.resyncs += 1
        _log.warning(
            "model %s: cannot %s at offset %d (%s); loaded the snapshot at offset %d",
            log.name,
            kind,
            offset,
            exc,
            model.offset,
        )
        return
    model.skip_to(offset + 1)
    log.saw(model.offset)
    log.progress()
    _log.info("model %s: %s applied at offset %d", log.name, kind, offset)


async def _target(
    log: RedisLog,
    store: RedisSnapshots,
    control: dict[str, Any],
    classes: Sequence[str],
    *,
    row_key: bytes,
    bits: int,
    tick: Callable[[], None],
) -> tuple[AppliedIds, list[str], int]:
    """What the switch leaves: the applied ids, excluded sources, and the offset it needs.

    The ids are those every follower's model will hold right after the switch: the
    snapshot's, then (a rebuild) those of the labels it relearns, in log order.
    """
    generation = control["generation"]
    state = None if generation is None else await asyncio.to_thread(store.load, generation)
    tick()
    window = log.state.applied_window or None
    if state is None:
        applied = AppliedIds(window)
    else:
        applied = AppliedIds.from_snapshot(state["applied"], state["format"], window=window)
    if control["control"] == "restore":
        return applied, sorted((state or {}).get("excluded", ())), -1
    excluded = frozenset(control["exclude_sources"])
    start = 0 if state is None else int(state["offset"])
    await log.refresh()  # the head cannot move while the freeze holds
    if log.first() > start:
        raise _trimmed(log.name, log.first())
    index = {c: y for y, c in enumerate(classes)}

    def admit(payloads: list[bytes]) -> None:
        """Set the ids of the decodable labels in order (the followers stop at the others,
        which hold no id to admit)."""
        paused = gc.isenabled()
        gc.disable()  # thousands of short-lived dicts: no use scanning them (as a replay does)
        try:
            while payloads:
                recs, error = records.decode_many(payloads, row_key, bits)
                applied.update(
                    (r["id"], y)
                    for r in recs
                    if r["id"] is not None
                    and r["source"] not in excluded
                    and (y := index.get(r["label"])) is not None
                )
                payloads = payloads[len(recs) + 1 :] if error is not None else []
                del recs
        finally:
            if paused:
                gc.enable()

    async for page in log.pages(start, log.head(), count=REPLAY):
        # An earlier restore or rebuild has no "d": a rebuild replays labels only.
        admit([data[b"d"] for _, data in page if b"d" in data])
        tick()
    return applied, sorted(excluded), start


async def _rebuilt(
    log: RedisLog, model: Model, offset: int, control: dict[str, Any], store: RedisSnapshots
) -> Model:
    """A model relearnt from the start the record names up to ``offset``, sources excluded."""
    fresh = model.fresh()
    if control["generation"] is not None:
        fresh.load_state(await asyncio.to_thread(store.load, int(control["generation"])))
    fresh.exclude_sources = frozenset(control["exclude_sources"])
    async for page in log.pages(fresh.offset, offset, count=REPLAY):
        payloads: list[bytes] = []
        for _, data in page:
            payload = data.get(b"d")
            if payload is not None:
                payloads.append(payload)
                continue
            fresh.apply_payloads(fresh.offset, payloads)  # the labels before a control record
            payloads = []
            fresh.skip_to(fresh.offset + 1)
        fresh.apply_payloads(fresh.offset, payloads)
        log.progress()
        await asyncio.sleep(0)  # scoring goes on, from the weights before the rebuild
    fresh.scored, fresh.duplicates = model.scored, model.duplicates
    return fresh


async def _skip_past(log: RedisLog, model: Model, offset: int, store: RedisSnapshots) -> bool:
    """Load the snapshot furthest along, if it is past ``offset``; False when there is none."""
    loaded = await asyncio.to_thread(store.load_furthest, offset + 1)
    if loaded is None:
        return False
    await model.until_resumed()
    model.load_state(loaded[0])
    model.skip_to(model.offset)  # wakes what waits for the offsets it jumped over
    log.saw(model.offset)
    return True


def _trimmed(name: str, first: int) -> Conflict:
    return Conflict(
        f"the log of {name!r} no longer holds labels below offset {first}; rebuild with "
        "from_snapshot or raise --log-retain",
        path="from_snapshot",
    )
