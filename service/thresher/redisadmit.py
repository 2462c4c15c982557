"""Admitting labels to a model's Redis stream exactly once: the append script and its answer.

One Lua script admits a batch atomically: a conflict (an id already labelled otherwise)
refuses it whole, duplicates are left out, and every new record takes the next dense offset.
It refuses everything while the model is deleted (another incarnation is live) or frozen for a
restore or rebuild (`redisswitch`). A record from an excluded source is appended but its id
stays open, as in the file log. `RedisLog.admit` (`redislog`) is the way in.

Ids are kept by their 16-byte hash (`appliedids.id_key`), as the replicas' `AppliedIds` keep
them, so a restore or rebuild can set the hash from a snapshot's arrays. Under
--applied-window the hash rotates exactly as `AppliedIds` does: when the current generation
holds N ids it becomes the previous one, so the script and every replica's index agree at
each offset. A hash of raw ids written before ids were hashed is still consulted until the
next restore or rebuild drops it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from .appliedids import id_key
from .errors import LogUnavailable, NotFound, Unavailable
from .redislog import FAILURES, RETRY_AFTER, unavailable

if TYPE_CHECKING:
    from .redislog import RedisLog

WAIT_MS = 1000  # how long an append waits for --redis-wait-replicas confirmations
ADMITTED, CONFLICT, GONE, FROZEN = 0, 1, 2, 3  # the first element of the script's answer

# KEYS: seq, stream, ids, live, freeze, excluded, previous ids, legacy raw ids. ARGV: token, n,
# window (0: none), then n quintuples (id key or "", raw id or "", label, source, payload). A
# record from an excluded source is appended but never applied, so its id stays open, as in the
# file log. The payloads are never decoded here: the script's msgpack reader cannot read the
# bins of a record (`records`).
APPEND = """
if redis.call('GET', KEYS[4]) ~= ARGV[1] then return {2} end
if redis.call('EXISTS', KEYS[5]) == 1 then return {3} end
local n, window = tonumber(ARGV[2]), tonumber(ARGV[3])
local legacy = redis.call('EXISTS', KEYS[8]) == 1
local dup, open = {}, {}
if redis.call('SCARD', KEYS[6]) > 0 then
  for i = 0, n - 1 do
    if redis.call('SISMEMBER', KEYS[6], ARGV[7 + 5 * i]) == 1 then open[i] = true end
  end
end
local function known(i)
  local key = ARGV[4 + 5 * i]
  local have = redis.call('HGET', KEYS[3], key) or redis.call('HGET', KEYS[7], key)
  if not have and legacy then have = redis.call('HGET', KEYS[8], ARGV[5 + 5 * i]) end
  return have
end
for i = 0, n - 1 do
  if ARGV[4 + 5 * i] ~= '' then
    local have = known(i)
    if have then
      if have ~= ARGV[6 + 5 * i] then return {1, i, have} end
      dup[i] = true
    end
  end
end
local first, count = -1, 0
for i = 0, n - 1 do
  local key = ARGV[4 + 5 * i]
  if not dup[i] and key ~= '' and not open[i] then
    if known(i) then
      dup[i] = true  -- an id earlier in this batch
    else
      redis.call('HSET', KEYS[3], key, ARGV[6 + 5 * i])
      if window > 0 and redis.call('HLEN', KEYS[3]) >= window then
        redis.call('RENAME', KEYS[3], KEYS[7])  -- as AppliedIds rotates
      end
    end
  end
  if not dup[i] then
    local seq = redis.call('INCR', KEYS[1])
    redis.call('XADD', KEYS[2], '0-' .. seq, 'd', ARGV[8 + 5 * i])
    if first < 0 then first = seq - 1 end
    count = count + 1
  end
end
local out = {0, first, count}
for i = 0, n - 1 do if dup[i] then out[#out + 1] = i end end
return out
"""


async def admit(
    log: RedisLog, payloads: list[bytes], keys: list[tuple[str | None, str, str]]
) -> tuple[int, list[int], tuple[int, str] | None]:
    """Append what is new, atomically: (first offset, duplicate positions, conflict).

    ``keys`` holds each record's (id, label, source), which the script checks.
    """
    args: list[Any] = [log.token, len(payloads), log.state.applied_window]
    for (event_id, label, source), payload in zip(keys, payloads, strict=True):
        if event_id is None:
            args += ["", "", label, source, payload]
        else:
            args += [id_key(event_id), event_id, label, source, payload]
    ks = [log.keys.seq, log.keys.stream, log.keys.ids, log.keys.live, log.keys.freeze,
          log.keys.excluded, log.keys.previous, log.keys.legacy]  # fmt: skip
    want, confirmed = log.state.wait_replicas, None
    try:
        if want:
            # WAIT counts this connection's writes, so it rides in the script's pipeline.
            async with log.state.client.pipeline(transaction=False) as pipe:
                await log.state.append(keys=ks, args=args, client=pipe)
                pipe.wait(want, WAIT_MS)
                reply, confirmed = await pipe.execute()
        else:
            reply = await log.state.append(keys=ks, args=args)
    except FAILURES as exc:
        log.state.failed(exc)
        raise unavailable(
            exc,
            "nothing was acknowledged. If the call timed out the labels may still be "
            "applied; a retry with the same ids is safe (they count as duplicates)",
        ) from exc
    log.state.up()
    code = int(reply[0])
    if code == GONE:
        raise NotFound(f"model {log.name!r} was deleted on another replica")
    if code == FROZEN:
        raise Unavailable(
            f"model {log.name!r} is being restored or rebuilt; labels are refused until "
            "that is appended to its stream (seconds); nothing was appended, retry shortly",
            retry_after=RETRY_AFTER,
        )
    if code == CONFLICT:
        return -1, [], (int(reply[1]), reply[2].decode())
    first, count = int(reply[1]), int(reply[2])
    if count:
        log.saw(first + count)
    if count and confirmed is not None and int(confirmed) < want:
        raise LogUnavailable(
            f"the labels reached the Redis primary but only {confirmed} of {want} replicas "
            f"confirmed them within {WAIT_MS} ms; they may still be applied later, and a "
            "retry with the same ids is safe (they count as duplicates)",
            retry_after=RETRY_AFTER,
        )
    return first, [int(i) for i in reply[3:]], None
