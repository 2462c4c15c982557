"""Figure 11: the applied-id index at 1M ids against the ``dict[str, int]`` it replaced.

Both go through the service's own snapshot store (``SnapshotStore.write`` / ``load``: msgpack
tree, array blobs, SHA-256, fsync, rename) in one temporary directory, in the same run, one
after the other per repeat. The dict figures are what format 1 did: ``dict(applied)`` on the
event loop at capture, the map packed into the msgpack tree, and a dict built again at load.
The index's capture is what ``Model.capture`` does with it: the live index referenced on the
loop, its snapshot arrays (``AppliedIds.state``, a gather) taken by a worker thread.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np

from thresher.appliedids import AppliedIds
from thresher.snapshots import SnapshotStore

from .common import Mode, median, row

IDS = 1_000_000
PROBES = 200_000


def _ids(n: int, seed: int) -> list[str]:
    """``n`` distinct uuid-like ids (36 characters), from a seeded generator."""
    raw = np.random.default_rng(seed).bytes(16 * n).hex()
    return [
        f"{h[:8]}-{h[8:12]}-{h[12:16]}-{h[16:20]}-{h[20:32]}"
        for h in (raw[k : k + 32] for k in range(0, 32 * n, 32))
    ]


def _timed(call: Any) -> tuple[float, Any]:
    start = time.perf_counter()
    out = call()
    return time.perf_counter() - start, out


def _dict_bytes(applied: dict[str, int]) -> int:
    # The table and its keys; the class indices are small ints Python shares.
    return sys.getsizeof(applied) + sum(sys.getsizeof(k) for k in applied)


def _one(directory: Path, ids: list[str], ys: list[int]) -> dict[str, float]:
    """One repeat: every figure for the dict (format 1) and the index (format 2)."""
    out: dict[str, float] = {}
    applied = dict(zip(ids, ys, strict=True))
    index = AppliedIds()
    out["set_index"], _ = _timed(lambda: index.update(zip(ids, ys, strict=True)))
    fresh: dict[str, int] = {}
    out["set_dict"], _ = _timed(lambda: fresh.update(zip(ids, ys, strict=True)))
    probes = ids[:: len(ids) // PROBES][:PROBES]
    out["get_index"], _ = _timed(lambda: [index.get(i) for i in probes])
    out["get_dict"], _ = _timed(lambda: [applied.get(i) for i in probes])

    out["capture_dict"], copied = _timed(lambda: dict(applied))
    out["capture_index"], live = _timed(lambda: {"applied": index})
    out["copy_index"], state = _timed(live["applied"].state)

    store = SnapshotStore(directory, keep=2)
    old = {"format": 1, "offset": IDS, "applied": copied}
    new = {"format": 2, "offset": IDS, "applied": state}
    out["write_dict"], old_info = _timed(lambda: store.write(old, offset=IDS, time=1.0))
    out["write_index"], new_info = _timed(lambda: store.write(new, offset=IDS, time=1.0))
    out["bytes_dict"], out["bytes_index"] = old_info.bytes, new_info.bytes

    def load_dict() -> dict[str, int]:
        loaded = store.load(old_info.generation)["applied"]
        return {str(k): int(v) for k, v in loaded.items()}  # as format 1's load_state did

    def load_index() -> AppliedIds:
        return AppliedIds.from_state(store.load(new_info.generation)["applied"])

    out["load_dict"], back = _timed(load_dict)
    out["load_index"], again = _timed(load_index)
    if len(back) != IDS or again != index:
        raise RuntimeError("a loaded snapshot does not hold the ids written")
    out["migrate"], _ = _timed(lambda: AppliedIds.from_pairs(back.items()))
    out["mem_dict"], out["mem_index"] = _dict_bytes(applied), index.nbytes
    out["slots"] = index.current.capacity
    return out


def rows(mode: Mode) -> list[dict[str, Any]]:
    ids = _ids(IDS, seed=11)
    ys = [i % 2 for i in range(IDS)]
    runs = []
    for _ in range(mode.repeats):
        with tempfile.TemporaryDirectory(prefix="bench-ids-") as tmp:
            runs.append(_one(Path(tmp), ids, ys))

    def both(key: str, scale: float = 1.0) -> tuple[list[float], list[float]]:
        return [r[f"{key}_index"] * scale for r in runs], [r[f"{key}_dict"] * scale for r in runs]

    peer = "dict[str, int] (format 1)"
    mine, theirs = both("capture", 1000)
    copy = median([r["copy_index"] * 1000 for r in runs])
    out = [
        row("11a. applied ids at 1M: snapshot capture on the event loop", median(mine), "ms",
            peer=median(theirs), peer_name=peer, target=("ratio<=", 0.1), samples=mine,
            peer_samples=theirs,
            note=f"a worker thread takes the index's arrays instead ({copy:.1f} ms) while label "
                 "application is held; the dict was copied on the loop"),
    ]  # fmt: skip
    for key, name, goal, note in (
        ("write", "11b. applied ids at 1M: snapshot write", 1.0,
         "SnapshotStore.write with fsync; the dict's map is packed holding the GIL, the "
         "index's arrays are hashed and written as they are"),
        ("load", "11c. applied ids at 1M: snapshot load", 0.5,
         "SnapshotStore.load + the index (or dict) built from it"),
    ):  # fmt: skip
        mine, theirs = both(key, 1000)
        out.append(row(name, median(mine), "ms", peer=median(theirs), peer_name=peer,
                       target=("ratio<=", goal), samples=mine, peer_samples=theirs,
                       note=note))  # fmt: skip
    mine, theirs = both("bytes", 1 / IDS)
    out.append(row("11d. applied ids at 1M: snapshot bytes per id", median(mine), "B",
                   peer=median(theirs), peer_name=peer, target=("ratio<=", 1.0),
                   note=f"file {median(mine) * IDS / 2**20:.1f} MiB vs "
                        f"{median(theirs) * IDS / 2**20:.1f} MiB"))  # fmt: skip
    mine, theirs = both("mem", 1 / IDS)
    slots = int(runs[0]["slots"])
    out.append(row("11e. applied ids at 1M: memory bytes per id", median(mine), "B",
                   peer=median(theirs), peer_name=peer, target=("ratio<=", 0.5),
                   note=f"index arrays ({slots:,} slots, {IDS / slots:.0%} full) vs the dict "
                        "and its id strings"))  # fmt: skip
    per_call = "per id; a label makes one to three such calls"
    for key, name, n in (
        ("set", "11f. applied ids: set, 1M new ids", IDS),
        ("get", "11g. applied ids at 1M: get of a present id", PROBES),
    ):
        mine, theirs = both(key, 1e9 / n)
        out.append(row(name, median(mine), "ns", peer=median(theirs), peer_name=peer,
                       target=("ratio<=", 4.0), samples=mine, peer_samples=theirs,
                       note=per_call))  # fmt: skip
    migrate = median([r["migrate"] for r in runs])
    out[2]["note"] += f"; a format 1 map becomes an index once, in {migrate:.2f} s"
    return out
