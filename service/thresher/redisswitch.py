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
of the stream stays where the computation read it.
"""

from __future__ import annotations

import asyncio
import logging
import secrets
from collections.abc import Sequence
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

FREEZE_MS = 60_000  # labels are refused at most this long if a replica dies mid-request
APPLY_TIMEOUT = 30.0  # seconds the requesting replica waits for its follower to switch
STAGE, REPLAY = 1000, 2048  # ids per HSET, labels per batch
ADMITTED, TRIMMED, GONE, FROZEN = 0, 1, 2, 3  # the first element of the script's answer

_log = logging.getLogger("thresher.redis")

# KEYS: seq, stream, ids, live, freeze, staged ids, excluded sources, previous ids, staged
# previous ids, legacy raw ids (dropped: the staged hashes hold every id the switch leaves).
# ARGV: token, freeze mark, control payload, lowest offset the stream must still hold (-1:
# none), then the excluded sources.
CONTROL = """
if redis.call('GET', KEYS[4]) ~= ARGV[1] then return {2} end
if redis.call('GET', KEYS[5]) ~= ARGV[2] then return {3} end
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
for i = 5, #ARGV do redis.call('SADD', KEYS[7], ARGV[i]) end
local seq = redis.call('INCR', KEYS[1])
redis.call('XADD', KEYS[2], '0-' .. seq, 'c', ARGV[3])
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


def restore(generation: int) -> dict[str, Any]:
    return {"control": "restore", "generation": generation}


def rebuild(exclude_sources: Sequence[str], generation: int | None) -> dict[str, Any]:
    return {
        "control": "rebuild",
        "generation": generation,
        "exclude_sources": sorted(exclude_sources),
    }


async def append(
    log: RedisLog, store: RedisSnapshots, control: dict[str, Any], classes: Sequence[str]
) -> int:
    """Append a control record with the applied ids it leaves, atomically; its offset."""
    client, keys, mark = log.state.client, log.keys, secrets.token_hex(8)
    try:
        if not await client.set(keys.freeze, mark, nx=True, px=FREEZE_MS):
            raise Unavailable(
                f"another restore or rebuild of model {log.name!r} is being appended; retry "
                "shortly",
                retry_after=2.0,
            )
        try:
            applied, excluded, need = await _target(log, store, control, classes)
            await client.delete(keys.staged, keys.staged_previous)
            staging = [keys.staged, keys.staged_previous]
            for where, table in zip(staging, applied.tables(), strict=False):
                ids, ys = table.keys()
                for k in range(0, len(ids), STAGE):
                    part = zip(ids[k : k + STAGE], ys[k : k + STAGE], strict=True)
                    await client.hset(where, mapping={i: classes[y] for i, y in part})
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
            ]
            payload = msgpack.packb(control, use_bin_type=True)
            reply = await client.eval(
                CONTROL, len(ks), *ks, log.token, mark, payload, need, *excluded
            )
        except BaseException:
            await client.eval(THAW, 3, keys.freeze, keys.staged, keys.staged_previous, mark)
            raise
    except FAILURES as exc:
        log.state.failed(exc)
        raise unavailable(exc, "nothing was appended; the model is unchanged") from exc
    code = int(reply[0])
    if code == GONE:
        raise NotFound(f"model {log.name!r} was deleted on another replica")
    if code == FROZEN:
        raise Unavailable(
            f"the restore or rebuild of model {log.name!r} took over {FREEZE_MS // 1000} s to "
            "prepare and was not appended; retry",
            retry_after=2.0,
        )
    if code == TRIMMED:
        raise _trimmed(log.name, int(reply[1]))
    offset = int(reply[1])
    log.saw(offset + 1)
    return offset


async def apply(
    log: RedisLog, model: Model, offset: int, raw: bytes, store: RedisSnapshots
) -> None:
    """Make the change the control record at ``offset`` asks for; the model moves past it."""
    control = msgpack.unpackb(raw, raw=False)
    kind, generation = control.get("control"), control.get("generation")
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
        if not await _skip_past(model, offset, store):
            raise
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
    _log.info("model %s: %s applied at offset %d", log.name, kind, offset)


async def _target(
    log: RedisLog, store: RedisSnapshots, control: dict[str, Any], classes: Sequence[str]
) -> tuple[AppliedIds, list[str], int]:
    """What the switch leaves: the applied ids, excluded sources, and the offset it needs.

    The ids are those every follower's model will hold right after the switch: the
    snapshot's, then (a rebuild) those of the labels it relearns, in log order.
    """
    generation = control["generation"]
    state = None if generation is None else await asyncio.to_thread(store.load, generation)
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
    async for _, data in log.entries(start, log.head()):
        payload = data.get(b"d")
        if payload is None:
            continue  # an earlier restore or rebuild: a rebuild replays labels only
        try:
            record = records.decode(payload)
        except records.CorruptRecord:
            continue  # the followers stop at it; it holds no id to admit
        event_id = record["id"]
        y = index.get(record["label"])
        if event_id is not None and record["source"] not in excluded and y is not None:
            applied[event_id] = y
    return applied, sorted(excluded), start


async def _rebuilt(
    log: RedisLog, model: Model, offset: int, control: dict[str, Any], store: RedisSnapshots
) -> Model:
    """A model relearnt from the start the record names up to ``offset``, sources excluded."""
    fresh = model.fresh()
    if control["generation"] is not None:
        fresh.load_state(await asyncio.to_thread(store.load, int(control["generation"])))
    fresh.exclude_sources = frozenset(control["exclude_sources"])
    payloads: list[bytes] = []
    async for _, data in log.entries(fresh.offset, offset):
        payload = data.get(b"d")
        if payload is not None:
            payloads.append(payload)
            if len(payloads) < REPLAY:
                continue
        fresh.apply_payloads(fresh.offset, payloads)
        payloads = []
        if payload is None:
            fresh.skip_to(fresh.offset + 1)
        await asyncio.sleep(0)  # scoring goes on, from the weights before the rebuild
    fresh.apply_payloads(fresh.offset, payloads)
    fresh.scored, fresh.duplicates = model.scored, model.duplicates
    return fresh


async def _skip_past(model: Model, offset: int, store: RedisSnapshots) -> bool:
    """Load the newest snapshot taken past ``offset``; False when there is none."""
    loaded = await asyncio.to_thread(store.load_newest)
    if loaded is None or loaded[1].offset <= offset:
        return False
    await model.until_resumed()
    model.load_state(loaded[0])
    return True


def _trimmed(name: str, first: int) -> Conflict:
    return Conflict(
        f"the log of {name!r} no longer holds labels below offset {first}; rebuild with "
        "from_snapshot or raise --log-retain",
        path="from_snapshot",
    )
