"""The hashed-feature linear learner: weights, the four update rules, scoring and explanations.

Pure: sparse rows in, arrays out; no I/O, no clocks, no globals. A row is ``(indices, values)``
with ``indices`` int64 sorted and unique in ``[0, 2**bits)`` and ``values`` float32; a batch is
the same in CSR form ``(indptr, indices, values)``. The caller adds the bias as an ordinary
constant feature, so there is no separate intercept. The input checks and the array kernels
live in :mod:`thresher.learner_kernels`; this module holds the model and its state.

Numbers. Weights are float32. Every decision uses float64: gathered weights are widened, products
are formed in float64 and each row is summed left to right in index order by one kernel
(``np.bincount`` with weights), used for single rows and batches alike, so a row gets the
bit-identical margin whichever entry point scores it. An update is computed in float64 and
rounded once to float32 per slot.

Averaged rule (Freund & Schapire, 1999; Collins, 2002). The served vector is the mean of the
weight vectors after each of the ``c`` labelled examples so far, kept lazily: on an update
``w += d`` and ``u += c * d`` where ``c`` counts the examples before this one, and the mean is
``w - u / c``. An update therefore costs O(nonzeros), not O(2**bits). ``u`` is float32 so a
bits=24 averaged model holds 2x the 64 MiB of its weights rather than 3x; the price is that each
addition to ``u`` rounds at 2**-24 of its size, so after ``k`` updates to one slot the averaged
weight is off by at most about ``k * 2**-24 * sum|d|`` (random-sign roundings grow like
``sqrt(k)``), far below the weight itself in practice. Under ``averaged`` the progressive
prediction of :meth:`Learner.update` (its ``predicted``, ``mistake`` and ``margins``) uses the
mean over the examples before this one, which is what serving would have answered; whether to
update is decided by the training vector ``w``, as in the published algorithm.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import numpy as np

from . import learner_state
from .errors import InvalidConfig, InvalidInput
from .learner_kernels import (
    apply_update,
    check_csr,
    check_labels,
    check_row,
    fire_one,
    fires,
    labels_of,
    row_sums,
    segments,
    serve_margins,
    served_weights,
    train_margins,
)
from .learner_state import STATE_FORMAT as STATE_FORMAT
from .learner_state import integer_in as _integer
from .learner_state import number as _number

try:  # the compiled kernels (_learner.c); the numpy kernels are their reference
    from . import _learner
except ImportError:  # pragma: no cover - a source checkout that was never built
    _learner = None  # type: ignore[assignment]

RULES = ("classic", "margin", "averaged", "passive_aggressive")
_RULE_CODES = {rule: code for code, rule in enumerate(RULES)}  # as the enum in _learner.c
MAX_BITS = 30
MAX_SLOTS = 1 << 28  # rows * 2**bits float32 weights: 1 GiB
MAX_CLASSES = 4096
_MAX_CHUNK = 1024


class Update(NamedTuple):
    """One progressive step: the prediction made before learning, and what learning did."""

    predicted: int
    mistake: bool
    margins: np.ndarray
    updated: bool


class BatchUpdate(NamedTuple):
    """Progressive steps of a batch: int64[n], bool[n], float64[n, rows], bool[n]."""

    predicted: np.ndarray
    mistakes: np.ndarray
    margins: np.ndarray
    updated: np.ndarray


class Learner:
    """A perceptron over hashed sparse features with a choice of update rule.

    Parameters
    ----------
    n_classes : int
        Number of classes, >= 2. Two classes give one weight row (class 1 is positive,
        predicted iff ``w·x > 0``; a tie is negative); more give one row per class (argmax,
        the lowest index wins ties).
    bits : int
        Each row has ``2**bits`` slots, 1 <= bits <= 30, ``rows * 2**bits <= 2**28``.
    rule : {"classic", "margin", "averaged", "passive_aggressive"}, default "classic"
        ``classic`` updates on mistakes; ``margin`` also when the right side wins by <= margin;
        ``averaged`` learns like classic and serves the running mean of the weights;
        ``passive_aggressive`` is PA-I (Crammer et al., 2006) with ``C = aggressiveness``.
    margin : float, default 0.0
        The margin τ of the ``margin`` rule, must be > 0 there; ignored by the other rules.
    aggressiveness : float, default 1.0
        PA-I step cap ``C`` > 0; ignored by the other rules.

    Attributes
    ----------
    weights_ : ndarray of float32, shape (rows, 2**bits)
        Learned training weights ``w``. Read-only for callers.
    accum_ : ndarray of float32, shape (rows, 2**bits) or None
        Learned averaging accumulator ``u`` (``averaged`` only).
    updates : int
        Number of updates that changed the weights.
    seen : int
        Number of labelled examples learned from (``c`` of the averaged rule).
    """

    def __init__(
        self,
        n_classes: int,
        bits: int,
        rule: str = "classic",
        margin: float = 0.0,
        aggressiveness: float = 1.0,
    ) -> None:
        self.n_classes = _integer(n_classes, "n_classes", 2, MAX_CLASSES)
        self.bits = _integer(bits, "bits", 1, MAX_BITS)
        self.rows = 1 if self.n_classes == 2 else self.n_classes
        if self.rows << self.bits > MAX_SLOTS:
            raise InvalidConfig(
                f"{self.rows} row(s) of 2**{self.bits} weights exceed {MAX_SLOTS} slots; "
                "use fewer bits",
                path="bits",
            )
        if rule not in RULES:
            raise InvalidConfig(f"must be one of {', '.join(RULES)}; got {rule!r}", path="rule")
        self.rule = str(rule)
        self.margin = _number(margin, "margin")
        if self.margin < 0 or (rule == "margin" and self.margin <= 0):
            raise InvalidConfig("the margin rule needs margin > 0, others >= 0", path="margin")
        self.aggressiveness = _number(aggressiveness, "aggressiveness")
        if self.aggressiveness <= 0:
            raise InvalidConfig("must be > 0", path="aggressiveness")
        self.dim = 1 << self.bits
        self.weights_ = np.zeros((self.rows, self.dim), dtype=np.float32)
        self.accum_: np.ndarray | None = (
            # np.zeros, not zeros_like: pages are only touched once written (lazy allocation)
            np.zeros((self.rows, self.dim), dtype=np.float32) if rule == "averaged" else None
        )
        self.updates = 0
        self.seen = 0
        self._chunk = 64
        # Score with the compiled kernel when built; False forces the numpy reference path.
        self.native = True

    # -- scoring ---------------------------------------------------------------------------

    def score_batch(self, indptr: Any, indices: Any, values: Any) -> tuple[np.ndarray, np.ndarray]:
        """Labels int64[n] and served margins float64[n, rows] of a CSR batch."""
        if _learner is not None and self.native:
            # Bit-identical to the numpy path below; None when the input needs its checks.
            made = _learner.margins(self.weights_, self.accum_, float(self.seen), self.rows,
                                    indptr, indices, values)  # fmt: skip
            if made is not None:
                labels = np.frombuffer(made[0], np.int64)
                return labels, np.frombuffer(made[1], np.float64).reshape(labels.size, self.rows)
        ptr, idx, x = check_csr(indptr, indices, values, self.bits)
        n = ptr.size - 1
        seen = float(self.seen)
        served = serve_margins(self.weights_, self.accum_, idx, x, segments(ptr), n, seen)
        return labels_of(served), served

    def score_lists(self, indptr: Any, indices: Any, values: Any) -> tuple[list[int], list[float]]:
        """:meth:`score_batch` as plain lists: labels[n] and the margins row after row (n * rows).

        The same numbers; for a handful of events, reading the kernel's bytes straight into
        lists is cheaper than making numpy arrays and converting them.
        """
        if _learner is not None and self.native:
            made = _learner.margins(self.weights_, self.accum_, float(self.seen), self.rows,
                                    indptr, indices, values)  # fmt: skip
            if made is not None:
                labels, margins = memoryview(made[0]).cast("q"), memoryview(made[1]).cast("d")
                return labels.tolist(), margins.tolist()
        labels, margins = self.score_batch(indptr, indices, values)
        return labels.tolist(), margins.ravel().tolist()

    def margins(self, indices: Any, values: Any) -> np.ndarray:
        """Served margins float64[rows] of one row."""
        ptr = np.array([0, np.asarray(indices).size], dtype=np.int64)
        return self.score_batch(ptr, indices, values)[1][0]

    def predict(self, indices: Any, values: Any) -> int:
        """The served class index of one row."""
        return int(labels_of(self.margins(indices, values)[None, :])[0])

    def explain(self, indices: Any, values: Any, k: int) -> list[tuple[int, float, float]]:
        """Top ``k`` (index, served weight, weight x value) toward the predicted class.

        Binary rows explain the single row (sign shows the side); multi-class rows explain the
        predicted class's row. Sorted by |contribution| descending, then index; zeros left out.
        """
        ptr = np.array([0, np.asarray(indices).size], dtype=np.int64)
        ptr, idx, x = check_csr(ptr, indices, values, self.bits)
        if k <= 0 or idx.size == 0:
            return []
        served = served_weights(self.weights_, self.accum_, idx, float(self.seen))
        row = 0
        if self.rows > 1:  # the same kernel as margins(), so the row is the predicted class
            row = int(np.argmax(row_sums(served * x, segments(ptr), 1)[0]))
        contrib = served[row] * x
        order = np.lexsort((idx, -np.abs(contrib)))
        order = order[contrib[order] != 0][:k]
        return [(int(idx[i]), float(served[row, i]), float(contrib[i])) for i in order]

    # -- learning --------------------------------------------------------------------------

    def update(self, indices: Any, values: Any, y: int) -> Update:
        """Predict one row with the served weights, then learn its true class ``y``."""
        if isinstance(y, bool) or not isinstance(y, int | np.integer):
            raise InvalidInput("must be an integer class index", path="y")
        if not 0 <= int(y) < self.n_classes:
            raise InvalidInput(f"must lie in [0, {self.n_classes})", path="y")
        if _learner is not None and self.native:
            size = np.asarray(indices).size
            made = self._learn_native(np.array([0, size]), indices, values, np.array([int(y)]))
            if made is not None:
                one = made[0]
                return Update(int(one[0][0]), bool(one[1][0]), one[2][0], bool(one[3][0]))
        idx, x = check_row(indices, values, self.bits)
        return self._step(idx, x, int(y))

    def _learn_native(
        self, indptr: Any, indices: Any, values: Any, ys: Any, before: bool = False
    ) -> tuple[BatchUpdate, np.ndarray | None] | None:
        """update_batch in the compiled kernel, or None when the input needs the numpy checks."""
        made = _learner.learn(self.weights_, self.accum_, self.rows, _RULE_CODES[self.rule],
                              self.margin, self.aggressiveness, float(self.seen), indptr,
                              indices, values, ys, before)  # fmt: skip
        if made is None:
            return None
        predicted = np.frombuffer(made[0], np.int64)
        margins = np.frombuffer(made[1], np.float64).reshape(predicted.size, self.rows)
        self.seen += predicted.size
        self.updates += made[3]
        mistakes = predicted != np.asarray(ys)
        steps = BatchUpdate(predicted, mistakes, margins, np.frombuffer(made[2], np.bool_))
        kept = np.frombuffer(made[4], np.float64).reshape(self.rows, -1) if before else None
        return steps, kept

    def _step(self, idx: np.ndarray, x: np.ndarray, y: int) -> Update:
        """One checked row through the same kernels and tests as a chunk of one."""
        seg = np.zeros(idx.size, dtype=np.int64)
        train = train_margins(self.weights_, idx, x, seg, 1)
        served = train
        if self.accum_ is not None:
            served = serve_margins(self.weights_, self.accum_, idx, x, seg, 1, float(self.seen))
        row = served[0]
        predicted = int(row[0] > 0) if self.rows == 1 else int(np.argmax(row))
        sq = 0.0  # only the passive-aggressive step needs ||x||²
        if self.rule == "passive_aggressive":
            sq = float(np.bincount(seg, weights=x * x, minlength=1)[0])
        fired = fire_one(train[0], y, idx.size, sq, rule=self.rule, margin=self.margin)
        if fired:
            self._apply(idx, x, y, train[0], sq)
        self.seen += 1
        return Update(predicted, predicted != y, row, fired)

    def _apply(self, idx: np.ndarray, x: np.ndarray, y: int, train: np.ndarray, sq: float) -> None:
        """Update the weights for one row that the rule fired on."""
        apply_update(self.weights_, self.accum_, idx, x, y, train, sq, rule=self.rule,
                     aggressiveness=self.aggressiveness, seen=self.seen)  # fmt: skip
        self.updates += 1

    def update_batch(self, indptr: Any, indices: Any, values: Any, ys: Any) -> BatchUpdate:
        """Learn a CSR batch in order; identical to calling :meth:`update` row by row.

        Rows are scored in chunks with the current weights; the rows before the first one the
        rule fires on keep their (bit-identical) margins, that row is applied, and scoring
        resumes after it. The chunk length follows the observed gap between updates. The
        compiled kernel, when built, does the same row by row in one pass.
        """
        if _learner is not None and self.native:
            made = self._learn_native(indptr, indices, values, ys)
            if made is not None:
                return made[0]
        ptr, idx, x = check_csr(indptr, indices, values, self.bits)
        n = ptr.size - 1
        ys = check_labels(ys, n, self.n_classes)
        predicted = np.zeros(n, dtype=np.int64)
        margins = np.zeros((n, self.rows), dtype=np.float64)
        updated = np.zeros(n, dtype=bool)
        seg_all, nnz = segments(ptr), np.diff(ptr)
        sq = np.bincount(seg_all, weights=x * x, minlength=n)  # per row, as _step sums it
        start = 0
        while start < n:
            if self._chunk <= 4:  # updates are dense: a chunk would be rescored at once
                lo, hi = int(ptr[start]), int(ptr[start + 1])
                step = self._step(idx[lo:hi], x[lo:hi], int(ys[start]))
                predicted[start], margins[start], updated[start] = step[0], step[2], step[3]
                self._chunk = 4 if step.updated else 8
                start += 1
                continue
            end = min(n, start + self._chunk)
            lo, hi = int(ptr[start]), int(ptr[end])
            m, sub_idx, xs, seg = end - start, idx[lo:hi], x[lo:hi], seg_all[lo:hi] - start
            train = train_margins(self.weights_, sub_idx, xs, seg, m)
            served = train
            if self.accum_ is not None:  # row j of the chunk is scored with c = seen + j
                counts = (self.seen + seg).astype(np.float64)
                served = serve_margins(self.weights_, self.accum_, sub_idx, xs, seg, m, counts)
            fired = fires(
                train,
                ys[start:end],
                nnz[start:end],
                sq[start:end],
                rule=self.rule,
                margin=self.margin,
            )
            fire = np.flatnonzero(fired)
            stop = int(fire[0]) + 1 if fire.size else m
            predicted[start : start + stop] = labels_of(served[:stop])
            margins[start : start + stop] = served[:stop]
            if fire.size:
                j = start + stop - 1
                a, b = int(ptr[j]), int(ptr[j + 1])
                self.seen += stop - 1
                self._apply(idx[a:b], x[a:b], int(ys[j]), train[stop - 1], float(sq[j]))
                self.seen += 1
                updated[j] = True
                self._chunk = max(4, min(_MAX_CHUNK, 2 * stop))
            else:
                self.seen += stop
                self._chunk = min(_MAX_CHUNK, 2 * self._chunk)
            start += stop
        return BatchUpdate(predicted, predicted != ys, margins, updated)

    def update_batch_explained(
        self, indptr: Any, indices: Any, values: Any, ys: Any
    ) -> tuple[BatchUpdate, np.ndarray]:
        """:meth:`update_batch`, plus the weights behind each prediction.

        Also returns ``before``, float64 (rows, nnz): for every nonzero of the batch, the served
        weights (``w``, or the averaged ``w - u/c``) its row was predicted with, gathered before
        that row's own update -- what explains a mistake. Row i's are ``before[:, indptr[i]:
        indptr[i + 1]]``.
        """
        if _learner is not None and self.native:
            made = self._learn_native(indptr, indices, values, ys, before=True)
            if made is not None:
                return made[0], made[1]  # type: ignore[return-value]
        ptr, idx, x = check_csr(indptr, indices, values, self.bits)
        n = ptr.size - 1
        labels = check_labels(ys, n, self.n_classes)
        before = np.zeros((self.rows, idx.size), dtype=np.float64)
        steps = []
        for i in range(n):  # the reference: row by row, gathering before each step
            lo, hi = int(ptr[i]), int(ptr[i + 1])
            before[:, lo:hi] = served_weights(
                self.weights_, self.accum_, idx[lo:hi], float(self.seen)
            )
            steps.append(self._step(idx[lo:hi], x[lo:hi], int(labels[i])))
        margins = np.array([s.margins for s in steps], np.float64).reshape(n, self.rows)
        predicted = np.array([s.predicted for s in steps], np.int64)
        updated = np.array([s.updated for s in steps], np.bool_)
        return BatchUpdate(predicted, predicted != labels, margins, updated), before

    # -- state -----------------------------------------------------------------------------

    def serving_weights(self) -> np.ndarray:
        """The served weights, float64 (rows, 2**bits); allocates O(2**bits), for inspection."""
        all_slots = np.arange(self.dim)
        return served_weights(self.weights_, self.accum_, all_slots, float(self.seen))

    def nonzero(self) -> int:
        """Slots (columns) where a weight or the averaging accumulator is nonzero.

        Counted over slices of about 2**20 weights, so the temporaries stay about a MiB.
        """
        step = max(1, (1 << 20) // self.rows)
        count = 0
        for lo in range(0, self.dim, step):
            used = np.any(self.weights_[:, lo : lo + step] != 0, axis=0)
            if self.accum_ is not None:
                used |= np.any(self.accum_[:, lo : lo + step] != 0, axis=0)
            count += int(np.count_nonzero(used))
        return count

    def state(self) -> dict[str, Any]:
        """Config, counters and the live arrays (copy them before writing from a thread)."""
        return learner_state.state_of(self)

    @classmethod
    def from_state(cls, state: dict[str, Any], *, copy: bool = True) -> Learner:
        """Rebuild a learner from :meth:`state` exactly; arrays are copied.

        With ``copy=False`` arrays that are already C-ordered and writable are adopted as they
        are (a freshly decoded snapshot's), so loading does not hold the weights twice.
        """
        return learner_state.rebuild(cls, state, copy=copy)

    def digest(self) -> str:
        """Hex SHA-256 of config, counters and array bytes; equal means bit-identical."""
        return learner_state.digest_of(self)
