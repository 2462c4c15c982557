"""A live model: its definition, featurizer, learner and quality counters, bound to its log.

`Model` is where a request's events become learning: it validates and featurizes, consults the
scored-event cache and the applied-id index, appends label records to the log, and applies them
to the learner strictly in log order. The scoring path lives in `scoring`, the labelling path in
`labelling` (requests) and `applying` (log order learning), all of which `Model` inherits. It
never touches files or sockets itself; the log and the snapshot store are handed in by
`lifecycle.ModelRegistry`, which owns creating, loading, snapshotting, restoring, rebuilding and
deleting models. The definition it is built from, `ModelConfig`, is parsed in `model_config`
and re-exported here.
"""

from __future__ import annotations

import asyncio
import hashlib
from collections import deque
from collections.abc import Mapping
from typing import Any

import numpy as np

from .appliedids import AppliedIds
from .applying import RECENT_MISTAKES
from .background import in_background
from .errors import InvalidConfig, Unavailable
from .eventcache import EventCache
from .features import FeatureSpec, Featurizer
from .labelling import LabelAck, Labelling, SharedLog
from .labellog import LabelLog
from .learner import Learner
from .model_config import RULES, ModelConfig
from .quality import Quality
from .scoring import Scoring
from .snapshot_format import Sparse, capture

__all__ = ["RULES", "LabelAck", "Model", "ModelConfig", "SharedLog"]

STATE_FORMAT = 2  # 2: the applied ids as `AppliedIds` arrays; 1 (still read): an id -> class map


def _capture_all(
    arrays: dict[str, np.ndarray], applied: AppliedIds
) -> tuple[dict[str, np.ndarray | Sparse], dict[str, Any]]:
    """Each array as a snapshot stores it, and the applied ids' state (new arrays too).

    Runs in a worker thread while applying is held, so neither changes meanwhile.
    """
    return {key: capture(array) for key, array in arrays.items()}, applied.state()


class Model(Scoring, Labelling):
    """One model's live state. All methods run on the event loop; none blocks on I/O."""

    def __init__(
        self,
        config: ModelConfig,
        log: LabelLog,
        *,
        cache: EventCache,
        max_fields: int = 1000,
        apply_on_append: bool = True,
        applied_window: int | None = None,
    ) -> None:
        self.config = config
        # Ids kept for exactly-once training: the last N to 2N applied ids, or all when None.
        self.applied_window = applied_window
        self.log = log
        self.cache = cache
        self.max_fields = max_fields
        # File mode applies right after the durable append; Redis mode applies what the
        # stream follower reads, so every replica applies the same records in the same order.
        self.apply_on_append = apply_on_append
        self.shared = log if isinstance(log, SharedLog) else None
        self._outcomes: dict[int, bool] = {}
        self.spec = FeatureSpec.from_json(config.features)
        self.featurizer = Featurizer(self.spec, config.bits, config.seed, config.signed)
        self.class_index = {c: i for i, c in enumerate(config.classes)}
        self.reset_learning()
        self._ready: dict[int, tuple[dict[str, Any], Any]] = {}
        self._waiters: dict[int, asyncio.Future[None]] = {}
        self.pending: dict[str, int] = {}
        self.scored = 0
        self._gathered = None  # score requests waiting for this loop turn's batch
        self.duplicates = 0
        self.last_update = 0.0
        self.recent_mistakes: deque[dict[str, Any]] = deque(maxlen=RECENT_MISTAKES)
        self.exclude_sources: frozenset[str] = frozenset()
        # Set while a restore or rebuild swaps the learned state: labels get 503 meanwhile.
        self.frozen: str | None = None
        self.inflight = 0
        self._idle = asyncio.Event()
        self._idle.set()
        # Held while a snapshot takes the weights: labels are appended, applied after.
        self.holds = 0
        self._resumed = asyncio.Event()
        self._resumed.set()

    def reset_learning(self) -> None:
        """Forget everything learned: empty weights, counters and applied ids at offset 0."""
        self.learner = Learner(
            len(self.config.classes),
            self.config.bits,
            rule=self.config.rule,
            margin=self.config.margin,
            aggressiveness=self.config.aggressiveness,
        )
        self.quality = Quality(list(self.config.classes))
        self._weights_digest: tuple[tuple[int, int, int], str] | None = None
        self._nonzero: tuple[tuple[int, int, int], int] | None = None
        self.applied = AppliedIds(self.applied_window)
        self.offset = 0

    @property
    def name(self) -> str:
        return self.config.name

    # -- state -----------------------------------------------------------------------------

    def state(self) -> dict[str, Any]:
        """Everything a snapshot holds; arrays are copies, safe to write from a thread."""
        state = self._state()
        for key, value in state["learner"].items():
            if isinstance(value, np.ndarray):
                state["learner"][key] = value.copy()
        state["applied"] = self.applied.state()
        return state

    async def capture(self) -> dict[str, Any]:
        """:meth:`state` at the applied offset, taken without stalling scoring.

        Label application is held while a worker thread takes the arrays slice by slice, as
        the snapshot will store them (a mostly-zero array as its nonzero elements, never
        copied whole), the applied-id tables among them; labels are still appended to the log
        meanwhile and applied after.
        """
        self.hold()
        try:
            state, learner = self._state(), self.learner
            live = state["learner"]
            arrays = {k: v for k, v in live.items() if isinstance(v, np.ndarray)}
            captured, state["applied"] = await in_background(
                "capture", _capture_all, arrays, state["applied"]
            )
            live.update(captured)
            if self.learner is not learner or self.offset != state["offset"]:
                raise Unavailable(
                    f"model {self.name!r} changed state while a snapshot was taken; retry",
                    retry_after=1.0,
                )
        finally:
            self.resume()
        return state

    def hold(self) -> None:
        """Stop applying labels until :meth:`resume`; they are still appended, scoring goes on."""
        self.holds += 1
        self._resumed.clear()

    def resume(self) -> None:
        """Undo one :meth:`hold`; the last one applies the labels that arrived meanwhile."""
        self.holds -= 1
        if self.holds == 0:
            self._resumed.set()
            self._drain()

    async def until_resumed(self) -> None:
        """Return once no :meth:`hold` is in force (appliers other than ``_drain`` wait here)."""
        await self._resumed.wait()

    def _state(self) -> dict[str, Any]:
        """:meth:`state` with the learner's live arrays and the live applied-id index in it."""
        return {
            "format": STATE_FORMAT,
            "config": self.config.to_json(),
            "offset": self.offset,
            "learner": self.learner.state(),
            "quality": self.quality.state(),
            "applied": self.applied,
            "excluded": sorted(self.exclude_sources),
            "scored": self.scored,
            "duplicates": self.duplicates,
            "last_update": self.last_update,
        }

    def load_state(self, state: Mapping[str, Any]) -> None:
        """Replace the learned state with a snapshot's; its arrays are taken over, not copied."""
        if state.get("format") not in (1, STATE_FORMAT):
            raise InvalidConfig(f"snapshot format {state.get('format')!r} is not supported")
        self.learner = Learner.from_state(state["learner"], copy=False)
        self._weights_digest = self._nonzero = None
        self.quality = Quality.from_state(state["quality"])
        applied = state["applied"]
        if isinstance(applied, AppliedIds):  # another model's live index (adopt): taken over
            self.applied = applied
        else:
            self.applied = AppliedIds.from_snapshot(
                applied, state["format"], window=self.applied_window
            )
        self.offset = int(state["offset"])
        self.exclude_sources = frozenset(state.get("excluded", ()))
        self.scored = int(state.get("scored", 0))
        self.duplicates = int(state.get("duplicates", 0))
        self.last_update = float(state.get("last_update", 0.0))

    def fresh(self) -> Model:
        """A model with this one's definition, log and event cache that has learned nothing."""
        return Model(
            self.config,
            self.log,
            cache=self.cache,
            max_fields=self.max_fields,
            apply_on_append=self.apply_on_append,
            applied_window=self.applied_window,
        )

    def adopt(self, other: Model) -> None:
        """Take over another model's learned state and offset (a rebuild's result)."""
        self.load_state(other._state())
        self.recent_mistakes = other.recent_mistakes
        self._wake_through(self.offset)

    def skip_to(self, offset: int) -> None:
        """Stand at ``offset`` without learning (past a control record); wake its waiters."""
        self.offset = offset
        self._wake_through(offset)

    def _wake_through(self, offset: int) -> None:
        for waiting in [o for o in self._waiters if o < offset]:
            future = self._waiters.pop(waiting)
            if not future.done():
                future.set_result(None)

    def weights_digest(self) -> str:
        """The learner's digest, hashed again only after the weights can have changed."""
        learner = self.learner
        # Weights change only through update calls, which move `seen`; a restore or rebuild
        # installs a new learner object.
        key = (id(learner), learner.seen, learner.updates)
        cached = self._weights_digest
        if cached is None or cached[0] != key:
            cached = (key, learner.digest())
            self._weights_digest = cached
        return cached[1]

    def digest(self) -> str:
        """SHA-256 of the weights and the deterministic counters: equal means identical."""
        h = hashlib.sha256()
        h.update(self.weights_digest().encode())
        h.update(self.quality.counters_digest().encode())
        return h.hexdigest()

    async def refresh(self, *, digest: bool = True) -> None:
        """Bring the cached :meth:`nonzero` (and weights digest) up to date off the event loop.

        Both read every weight: at bits=24 that is tens of milliseconds that would stall scoring
        if done on the loop after every change. Label application is held meanwhile (labels are
        still appended and are applied after), so the weights hold still under the worker
        thread; scoring goes on.
        """
        learner = self.learner
        key = (id(learner), learner.seen, learner.updates)
        stale_nonzero = self._nonzero is None or self._nonzero[0] != key
        stale_digest = digest and (self._weights_digest is None or self._weights_digest[0] != key)
        if not (stale_nonzero or stale_digest):
            return
        self.hold()
        try:
            learner = self.learner
            key = (id(learner), learner.seen, learner.updates)
            if stale_nonzero:
                self._nonzero = (key, await asyncio.to_thread(learner.nonzero))
            if stale_digest:
                self._weights_digest = (key, await asyncio.to_thread(learner.digest))
        finally:
            self.resume()

    def nonzero(self) -> int:
        """The learner's used slots, counted again only after the weights can have changed."""
        learner = self.learner
        key = (id(learner), learner.seen, learner.updates)  # as in weights_digest
        cached = self._nonzero
        if cached is None or cached[0] != key:
            cached = (key, learner.nonzero())
            self._nonzero = cached
        return cached[1]

    def summary(self) -> dict[str, Any]:
        report = self.config.to_json()
        nonzero = self.nonzero()
        report.update(
            labelled=int(self.quality.labelled),
            mistakes=int(self.quality.mistakes),
            scored=self.scored,
            duplicates=self.duplicates,
            offset=self.offset,
            head=self.log.head(),
            digest=self.digest(),
            weights_digest=self.weights_digest(),
            nonzero=nonzero,
            hash_load=nonzero / float(1 << self.config.bits),
            cache_entries=len(self.cache),
            last_update=self.last_update or None,
            excluded_sources=sorted(self.exclude_sources),
        )
        return report
