"""Learning a run of rows as one batch while keeping the weights behind its latest mistakes.

PURE: arrays in, arrays out; it writes only into the learner it is handed, through the
learner's own :meth:`~thresher.learner.Learner.update_batch`. That call equals
:meth:`~thresher.learner.Learner.update` row by row, but explaining a mistake needs the served
weights the row was predicted with, and by the time the batch reports which rows were mistakes
the weights have moved on. So the run is learned in segments of ``SEGMENT`` rows, each after a
copy of the weights at that segment's own slots. Once the run is done, only the segments that
hold one of the last ``keep`` mistakes are replayed on their small copy, with the learner's
update kernel and the rows the batch reported as updated, up to those rows. The copy starts
with the learner's float32 values at those slots and each replayed update repeats the same
float64 operations, so the weights read from it are the ones the row-by-row path gathers.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np

from .learner import BatchUpdate, Learner
from .learner_kernels import apply_update, served_weights, train_margins

SEGMENT = 256  # rows learned after one copy; a replay walks at most one segment's updates


class Learned(NamedTuple):
    """A batch's progressive steps, and for the last ``keep`` mistakes the weights behind them.

    ``before`` maps a row number to its served weights, float64 (rows, nnz of that row), as
    they were when the row was predicted (before its own update).
    """

    steps: BatchUpdate
    before: dict[int, np.ndarray]


class _Mark(NamedTuple):
    start: int  # first row of the segment
    stop: int  # one past its last row
    seen: int  # learner.seen before the segment
    weights: np.ndarray  # float32 (rows, nnz of the segment), gathered at its slots
    accum: np.ndarray | None


def learn_batch(
    learner: Learner,
    indptr: np.ndarray,
    indices: np.ndarray,
    values: np.ndarray,
    ys: np.ndarray,
    *,
    keep: int,
) -> Learned:
    """Learn a CSR batch in order, as ``update_batch``; keep weights of the last ``keep`` mistakes.

    ``indptr`` int64 (n+1,), ``indices`` int64 (nnz,), ``values`` float32 (nnz,) as the
    featurizer makes them, ``ys`` int64 (n,) class indices.
    """
    ptr = np.asarray(indptr, dtype=np.int64)
    idx = np.asarray(indices, dtype=np.int64)
    ys = np.asarray(ys, dtype=np.int64)
    n = ptr.size - 1
    if keep <= 0 or n <= 0:
        return Learned(learner.update_batch(ptr, idx, values, ys), {})
    steps: list[BatchUpdate] = []
    marks: list[_Mark] = []
    for start in range(0, n, SEGMENT):
        stop = min(n, start + SEGMENT)
        lo, hi = int(ptr[start]), int(ptr[stop])
        slots = idx[lo:hi]
        accum = learner.accum_
        marks.append(
            _Mark(
                start,
                stop,
                learner.seen,
                learner.weights_.take(slots, axis=1),
                None if accum is None else accum.take(slots, axis=1),
            )
        )
        sub_ptr = ptr[start : stop + 1] - lo
        steps.append(learner.update_batch(sub_ptr, slots, values[lo:hi], ys[start:stop]))
    whole = _joined(steps)
    wanted = np.flatnonzero(whole.mistakes)[-keep:]
    before: dict[int, np.ndarray] = {}
    if wanted.size:
        for mark in marks:
            rows = wanted[(wanted >= mark.start) & (wanted < mark.stop)]
            if rows.size:
                _replay(learner, mark, ptr, idx, values, ys, whole.updated, rows, before)
    return Learned(whole, before)


def _joined(steps: list[BatchUpdate]) -> BatchUpdate:
    if len(steps) == 1:
        return steps[0]
    return BatchUpdate(*(np.concatenate(parts) for parts in zip(*steps, strict=True)))


def _replay(
    learner: Learner,
    mark: _Mark,
    ptr: np.ndarray,
    idx: np.ndarray,
    values: np.ndarray,
    ys: np.ndarray,
    updated: np.ndarray,
    rows: np.ndarray,
    before: dict[int, np.ndarray],
) -> None:
    """Walk one segment on a copy of its slots, reading the weights of ``rows`` on the way."""
    lo, hi = int(ptr[mark.start]), int(ptr[mark.stop])
    slots, first = np.unique(idx[lo:hi], return_index=True)
    weights = mark.weights[:, first]  # fancy indexing copies: the mark stays as it was
    accum = None if mark.accum is None else mark.accum[:, first]
    wanted = set(rows.tolist())
    last = int(rows[-1])
    # Only the rows read and the rows that changed the weights matter on the way to ``last``.
    moved = np.flatnonzero(updated[mark.start : last]) + mark.start
    for k in sorted(wanted.union(moved.tolist())):
        a, b = int(ptr[k]), int(ptr[k + 1])
        at = np.searchsorted(slots, idx[a:b])
        seen = mark.seen + (k - mark.start)  # examples learned before row k: c of averaging
        if k in wanted:
            before[k] = served_weights(weights, accum, at, float(seen))
        if k < last and updated[k]:
            x = values[a:b].astype(np.float64)
            one_row = np.zeros(b - a, dtype=np.int64)
            train = train_margins(weights, at, x, one_row, 1)[0]
            sq = float(np.bincount(one_row, weights=x * x, minlength=1)[0])
            apply_update(weights, accum, at, x, int(ys[k]), train, sq, rule=learner.rule,
                         aggressiveness=learner.aggressiveness, seen=seen)  # fmt: skip
