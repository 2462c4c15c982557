"""The hashed-feature linear learner: weights, the four update rules, scoring and explanations.

Pure: sparse rows in, arrays out; no I/O, no clocks, no globals. A row is ``(indices, values)``
with ``indices`` int64 sorted and unique in ``[0, 2**bits)`` and ``values`` float32; a batch is
the same in CSR form ``(indptr, indices, values)``. The caller adds the bias as an ordinary
constant feature, so there is no separate intercept.

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

import hashlib
import math
from typing import Any, NamedTuple

import numpy as np

from .errors import InvalidConfig, InvalidInput

RULES = ("classic", "margin", "averaged", "passive_aggressive")
STATE_FORMAT = 1
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


def _number(value: Any, path: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float | np.integer | np.floating):
        raise InvalidConfig(f"must be a number, got {type(value).__name__}", path=path)
    number = float(value)
    if not math.isfinite(number):
        raise InvalidConfig("must be a finite number", path=path)
    return number


def _integer(value: Any, path: str, lo: int, hi: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise InvalidConfig(f"must be an integer, got {type(value).__name__}", path=path)
    if not lo <= int(value) <= hi:
        raise InvalidConfig(f"must be between {lo} and {hi}, got {int(value)}", path=path)
    return int(value)


def _segments(ptr: np.ndarray) -> np.ndarray:
    """The row number of every nonzero of a CSR batch."""
    return np.repeat(np.arange(ptr.size - 1, dtype=np.int64), np.diff(ptr))


def _rival_one(scores: list[float], y: int) -> int:
    """The highest-scoring wrong class (lowest index on ties)."""
    best = -1
    for r, score in enumerate(scores):
        if r != y and (best < 0 or score > scores[best]):
            best = r
    return best


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
            np.zeros_like(self.weights_) if rule == "averaged" else None
        )
        self.updates = 0
        self.seen = 0
        self._chunk = 64

    # -- input checks ----------------------------------------------------------------------

    def _csr(self, indptr: Any, indices: Any, values: Any) -> tuple[np.ndarray, ...]:
        ptr = np.asarray(indptr)
        idx = np.asarray(indices)
        val = np.asarray(values)
        if ptr.ndim != 1 or ptr.size < 1 or ptr.dtype.kind not in "iu":
            raise InvalidInput("must be a 1-D integer array of n+1 offsets", path="indptr")
        if idx.ndim != 1 or (idx.size and idx.dtype.kind not in "iu"):
            raise InvalidInput("must be a 1-D integer array", path="indices")
        if val.ndim != 1 or val.shape != idx.shape or (val.size and val.dtype.kind not in "fiu"):
            raise InvalidInput("must be a 1-D numeric array as long as indices", path="values")
        ptr = ptr.astype(np.int64, copy=False)
        idx = idx.astype(np.int64, copy=False)
        if ptr[0] != 0 or ptr[-1] != idx.size or (ptr.size > 1 and np.any(np.diff(ptr) < 0)):
            raise InvalidInput("must rise from 0 to the number of nonzeros", path="indptr")
        if idx.size:
            if idx.min() < 0 or idx.max() >= self.dim:
                raise InvalidInput(f"must lie in [0, 2**{self.bits})", path="indices")
            rising = np.diff(idx) > 0
            inner = ptr[1:-1]
            rising[inner[(inner > 0) & (inner < idx.size)] - 1] = True  # row boundaries
            if not rising.all():
                raise InvalidInput("must be sorted and unique within each row", path="indices")
        x = val.astype(np.float64)
        if not np.isfinite(x).all():
            raise InvalidInput("must all be finite", path="values")
        return ptr, idx, x

    def _row(self, indices: Any, values: Any) -> tuple[np.ndarray, np.ndarray]:
        """One row checked like :meth:`_csr`, with fewer array passes."""
        idx, val = np.asarray(indices), np.asarray(values)
        if idx.ndim != 1 or (idx.size and idx.dtype.kind not in "iu"):
            raise InvalidInput("must be a 1-D integer array", path="indices")
        if val.shape != idx.shape or (val.size and val.dtype.kind not in "fiu"):
            raise InvalidInput("must be a 1-D numeric array as long as indices", path="values")
        idx = idx.astype(np.int64, copy=False)
        if idx.size:
            if idx[0] < 0 or idx[-1] >= self.dim:
                raise InvalidInput(f"must lie in [0, 2**{self.bits})", path="indices")
            if idx.size > 1 and not (idx[1:] > idx[:-1]).all():
                raise InvalidInput("must be sorted and unique within each row", path="indices")
        x = val.astype(np.float64)
        if not math.isfinite(float(x.sum())):  # float32 inputs cannot overflow a double sum
            raise InvalidInput("must all be finite", path="values")
        return idx, x

    def _labels_in(self, ys: Any, n: int) -> np.ndarray:
        arr = np.asarray(ys)
        if arr.shape != (n,) or (n and arr.dtype.kind not in "iu"):
            raise InvalidInput(f"must be {n} integer class indices", path="ys")
        arr = arr.astype(np.int64, copy=False)
        if n and (arr.min() < 0 or arr.max() >= self.n_classes):
            raise InvalidInput(f"must lie in [0, {self.n_classes})", path="ys")
        return arr

    # -- kernels ---------------------------------------------------------------------------

    def _sums(self, products: np.ndarray, seg: np.ndarray, n: int) -> np.ndarray:
        """Row sums of float64 products (rows, nnz) -> (n, rows), left to right per row."""
        out = np.empty((n, self.rows), dtype=np.float64)
        for r in range(self.rows):
            out[:, r] = np.bincount(seg, weights=products[r], minlength=n)
        return out

    def _served(self, idx: np.ndarray, counts: np.ndarray | float) -> np.ndarray:
        """Served weights (rows, nnz) float64 at ``idx``; ``counts`` is c per nonzero."""
        gathered = self.weights_.take(idx, axis=1).astype(np.float64)
        if self.accum_ is None:
            return gathered
        # c = 0 only before the first example, when u is still zero: dividing by 1 is exact.
        return gathered - self.accum_.take(idx, axis=1).astype(np.float64) / np.maximum(counts, 1.0)

    def _train(self, idx: np.ndarray, x: np.ndarray, seg: np.ndarray, n: int) -> np.ndarray:
        """Training margins (n, rows) of the rows ``seg`` labels."""
        return self._sums(self.weights_.take(idx, axis=1).astype(np.float64) * x, seg, n)

    def _serve(
        self, idx: np.ndarray, x: np.ndarray, seg: np.ndarray, n: int, counts: np.ndarray | float
    ) -> np.ndarray:
        """Served margins (n, rows); ``counts`` is the averaging count c (per nonzero or one)."""
        if self.accum_ is None:
            return self._train(idx, x, seg, n)
        return self._sums(self._served(idx, counts) * x, seg, n)

    def _label(self, margins: np.ndarray) -> np.ndarray:
        if self.rows == 1:
            return (margins[:, 0] > 0).astype(np.int64)
        return np.argmax(margins, axis=1).astype(np.int64)

    def _fires(
        self, train: np.ndarray, ys: np.ndarray, nnz: np.ndarray, sq: np.ndarray
    ) -> np.ndarray:
        """Which rows the rule would update on, given the training margins."""
        if self.rows == 1:
            s = train[:, 0]
            sign = np.where(ys == 1, 1.0, -1.0)
            if self.rule == "margin":
                fire = sign * s <= self.margin
            elif self.rule == "passive_aggressive":
                return (1.0 - sign * s > 0) & (sq > 0)
            else:
                fire = np.where(ys == 1, s <= 0, s > 0)
        else:
            rows, masked = np.arange(ys.size), train.copy()
            masked[rows, ys] = -np.inf  # the rival is the best wrong class, lowest index on ties
            gap = train[rows, ys] - train[rows, np.argmax(masked, axis=1)]
            if self.rule == "margin":
                fire = gap <= self.margin
            elif self.rule == "passive_aggressive":
                return (1.0 - gap > 0) & (sq > 0)
            else:
                fire = np.argmax(train, axis=1) != ys
        return fire & (nnz > 0)

    def _fire_one(self, train: np.ndarray, y: int, nnz: int, sq: float) -> bool:
        """:meth:`_fires` for one row, in Python floats (the same IEEE double operations)."""
        t = train.tolist()
        if self.rows == 1:
            s, sign = t[0], (1.0 if y == 1 else -1.0)
            if self.rule == "margin":
                fire = sign * s <= self.margin
            elif self.rule == "passive_aggressive":
                return 1.0 - sign * s > 0 and sq > 0
            else:
                fire = s <= 0 if y == 1 else s > 0
        else:
            gap = t[y] - t[_rival_one(t, y)]
            if self.rule == "margin":
                fire = gap <= self.margin
            elif self.rule == "passive_aggressive":
                return 1.0 - gap > 0 and sq > 0
            else:
                fire = t.index(max(t)) != y
        return fire and nnz > 0

    def _apply(self, idx: np.ndarray, x: np.ndarray, y: int, train: np.ndarray, sq: float) -> None:
        """Update the weights for one row that the rule fired on."""
        step = 1.0
        if self.rows == 1:
            sign = 1.0 if y == 1 else -1.0
            if self.rule == "passive_aggressive":
                step = min(self.aggressiveness, (1.0 - sign * float(train[0])) / sq)
            changes = [(0, sign * step * x)]
        else:
            rival = _rival_one(train.tolist(), y)
            if self.rule == "passive_aggressive":
                loss = 1.0 - (float(train[y]) - float(train[rival]))
                step = min(self.aggressiveness, loss / (2.0 * sq))
            delta = step * x
            changes = [(y, delta), (rival, -delta)]
        c = float(self.seen)
        for row, delta in changes:
            w = self.weights_[row]
            w[idx] = (w[idx].astype(np.float64) + delta).astype(np.float32)
            if self.accum_ is not None:
                u = self.accum_[row]
                u[idx] = (u[idx].astype(np.float64) + c * delta).astype(np.float32)
        self.updates += 1

    # -- scoring ---------------------------------------------------------------------------

    def score_batch(self, indptr: Any, indices: Any, values: Any) -> tuple[np.ndarray, np.ndarray]:
        """Labels int64[n] and served margins float64[n, rows] of a CSR batch."""
        ptr, idx, x = self._csr(indptr, indices, values)
        n = ptr.size - 1
        served = self._serve(idx, x, _segments(ptr), n, float(self.seen))
        return self._label(served), served

    def margins(self, indices: Any, values: Any) -> np.ndarray:
        """Served margins float64[rows] of one row."""
        ptr = np.array([0, np.asarray(indices).size], dtype=np.int64)
        return self.score_batch(ptr, indices, values)[1][0]

    def predict(self, indices: Any, values: Any) -> int:
        """The served class index of one row."""
        return int(self._label(self.margins(indices, values)[None, :])[0])

    def explain(self, indices: Any, values: Any, k: int) -> list[tuple[int, float, float]]:
        """Top ``k`` (index, served weight, weight x value) toward the predicted class.

        Binary rows explain the single row (sign shows the side); multi-class rows explain the
        predicted class's row. Sorted by |contribution| descending, then index; zeros left out.
        """
        ptr = np.array([0, np.asarray(indices).size], dtype=np.int64)
        ptr, idx, x = self._csr(ptr, indices, values)
        if k <= 0 or idx.size == 0:
            return []
        served = self._served(idx, float(self.seen))
        row = 0
        if self.rows > 1:  # the same kernel as margins(), so the row is the predicted class
            row = int(np.argmax(self._sums(served * x, _segments(ptr), 1)[0]))
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
        idx, x = self._row(indices, values)
        return self._step(idx, x, int(y))

    def _step(self, idx: np.ndarray, x: np.ndarray, y: int) -> Update:
        """One checked row through the same kernels and tests as a chunk of one."""
        seg = np.zeros(idx.size, dtype=np.int64)
        train = self._train(idx, x, seg, 1)
        served = train if self.accum_ is None else self._serve(idx, x, seg, 1, float(self.seen))
        row = served[0]
        predicted = int(row[0] > 0) if self.rows == 1 else int(np.argmax(row))
        sq = 0.0  # only the passive-aggressive step needs ||x||²
        if self.rule == "passive_aggressive":
            sq = float(np.bincount(seg, weights=x * x, minlength=1)[0])
        fired = self._fire_one(train[0], y, idx.size, sq)
        if fired:
            self._apply(idx, x, y, train[0], sq)
        self.seen += 1
        return Update(predicted, predicted != y, row, fired)

    def update_batch(self, indptr: Any, indices: Any, values: Any, ys: Any) -> BatchUpdate:
        """Learn a CSR batch in order; identical to calling :meth:`update` row by row.

        Rows are scored in chunks with the current weights; the rows before the first one the
        rule fires on keep their (bit-identical) margins, that row is applied, and scoring
        resumes after it. The chunk length follows the observed gap between updates.
        """
        ptr, idx, x = self._csr(indptr, indices, values)
        n = ptr.size - 1
        ys = self._labels_in(ys, n)
        predicted = np.zeros(n, dtype=np.int64)
        margins = np.zeros((n, self.rows), dtype=np.float64)
        updated = np.zeros(n, dtype=bool)
        seg_all, nnz = _segments(ptr), np.diff(ptr)
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
            train = self._train(sub_idx, xs, seg, m)
            served = train
            if self.accum_ is not None:  # row j of the chunk is scored with c = seen + j
                served = self._serve(sub_idx, xs, seg, m, (self.seen + seg).astype(np.float64))
            fire = np.flatnonzero(self._fires(train, ys[start:end], nnz[start:end], sq[start:end]))
            stop = int(fire[0]) + 1 if fire.size else m
            predicted[start : start + stop] = self._label(served[:stop])
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

    # -- state -----------------------------------------------------------------------------

    def serving_weights(self) -> np.ndarray:
        """The served weights, float64 (rows, 2**bits); allocates O(2**bits), for inspection."""
        all_slots = np.arange(self.dim)
        return self._served(all_slots, float(self.seen))

    def nonzero(self) -> int:
        """Slots (columns) where a weight or the averaging accumulator is nonzero."""
        used = np.any(self.weights_ != 0, axis=0)
        if self.accum_ is not None:
            used |= np.any(self.accum_ != 0, axis=0)
        return int(np.count_nonzero(used))

    def state(self) -> dict[str, Any]:
        """Config, counters and the live arrays (copy them before writing from a thread)."""
        state: dict[str, Any] = {
            "format": STATE_FORMAT,
            "n_classes": self.n_classes,
            "bits": self.bits,
            "rule": self.rule,
            "margin": self.margin,
            "aggressiveness": self.aggressiveness,
            "updates": self.updates,
            "seen": self.seen,
            "weights": self.weights_,
        }
        if self.accum_ is not None:
            state["accum"] = self.accum_
        return state

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> Learner:
        """Rebuild a learner from :meth:`state` exactly (arrays are copied)."""
        if not isinstance(state, dict) or state.get("format") != STATE_FORMAT:
            raise InvalidConfig(f"learner state format must be {STATE_FORMAT}", path="format")
        try:
            learner = cls(
                state["n_classes"],
                state["bits"],
                rule=state["rule"],
                margin=state["margin"],
                aggressiveness=state["aggressiveness"],
            )
        except KeyError as missing:
            raise InvalidConfig("missing from learner state", path=str(missing.args[0])) from None
        learner.updates = _integer(state.get("updates"), "updates", 0, 2**63 - 1)
        learner.seen = _integer(state.get("seen"), "seen", 0, 2**63 - 1)
        shape = learner.weights_.shape
        for key in ("weights", "accum") if learner.accum_ is not None else ("weights",):
            arr = state.get(key)
            if not isinstance(arr, np.ndarray) or arr.dtype != np.float32 or arr.shape != shape:
                raise InvalidConfig(f"must be a float32 array of shape {shape}", path=key)
            setattr(learner, f"{key}_", np.array(arr, dtype=np.float32, order="C"))
        return learner

    def digest(self) -> str:
        """Hex SHA-256 of config, counters and array bytes; equal means bit-identical."""
        h = hashlib.sha256()
        header = (
            f"thresher-learner/{STATE_FORMAT}|{self.n_classes}|{self.bits}|{self.rule}|"
            f"{self.margin.hex()}|{self.aggressiveness.hex()}|{self.updates}|{self.seen}|"
        )
        h.update(header.encode())
        for arr in (self.weights_, self.accum_):
            if arr is not None:
                h.update(memoryview(np.ascontiguousarray(arr, dtype="<f4")).cast("B"))
        return h.hexdigest()
