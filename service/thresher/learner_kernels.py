"""The learner's array layer: CSR input checks, margins, which rows a rule fires on, one update.

PURE: the checks turn caller arrays into int64 indices and float64 values, or raise
``InvalidInput`` naming the bad argument; the kernels take float32 weights ``(rows, 2**bits)``
and checked CSR pieces and return float64 arrays, and only :func:`apply_update` writes, into
the weight (and averaging) arrays it is handed. Every margin is widened to float64 and summed
left to right in index order by :func:`row_sums`, for single rows and batches alike, so a row
gets the bit-identical margin whichever entry point of :class:`~thresher.learner.Learner`
scores it. One weight row (``rows == 1``) is the binary case, class 1 positive; more rows are
one per class, the rival being the best wrong class.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .errors import InvalidInput

# -- input checks -------------------------------------------------------------------------


def check_csr(
    indptr: Any, indices: Any, values: Any, bits: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A CSR batch as (indptr int64, indices int64, values float64), or InvalidInput."""
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
        if idx.min() < 0 or idx.max() >= 1 << bits:
            raise InvalidInput(f"must lie in [0, 2**{bits})", path="indices")
        rising = np.diff(idx) > 0
        inner = ptr[1:-1]
        rising[inner[(inner > 0) & (inner < idx.size)] - 1] = True  # row boundaries
        if not rising.all():
            raise InvalidInput("must be sorted and unique within each row", path="indices")
    x = val.astype(np.float64)
    if not np.isfinite(x).all():
        raise InvalidInput("must all be finite", path="values")
    return ptr, idx, x


def check_row(indices: Any, values: Any, bits: int) -> tuple[np.ndarray, np.ndarray]:
    """One row checked like :func:`check_csr`, with fewer array passes."""
    idx, val = np.asarray(indices), np.asarray(values)
    if idx.ndim != 1 or (idx.size and idx.dtype.kind not in "iu"):
        raise InvalidInput("must be a 1-D integer array", path="indices")
    if val.shape != idx.shape or (val.size and val.dtype.kind not in "fiu"):
        raise InvalidInput("must be a 1-D numeric array as long as indices", path="values")
    idx = idx.astype(np.int64, copy=False)
    if idx.size:
        if idx[0] < 0 or idx[-1] >= 1 << bits:
            raise InvalidInput(f"must lie in [0, 2**{bits})", path="indices")
        if idx.size > 1 and not (idx[1:] > idx[:-1]).all():
            raise InvalidInput("must be sorted and unique within each row", path="indices")
    x = val.astype(np.float64)
    if not math.isfinite(float(x.sum())):  # float32 inputs cannot overflow a double sum
        raise InvalidInput("must all be finite", path="values")
    return idx, x


def check_labels(ys: Any, n: int, n_classes: int) -> np.ndarray:
    """``n`` class indices as int64, each in [0, n_classes), or InvalidInput."""
    arr = np.asarray(ys)
    if arr.shape != (n,) or (n and arr.dtype.kind not in "iu"):
        raise InvalidInput(f"must be {n} integer class indices", path="ys")
    arr = arr.astype(np.int64, copy=False)
    if n and (arr.min() < 0 or arr.max() >= n_classes):
        raise InvalidInput(f"must lie in [0, {n_classes})", path="ys")
    return arr


# -- kernels ------------------------------------------------------------------------------


def segments(ptr: np.ndarray) -> np.ndarray:
    """The row number of every nonzero of a CSR batch."""
    return np.repeat(np.arange(ptr.size - 1, dtype=np.int64), np.diff(ptr))


def rival_one(scores: list[float], y: int) -> int:
    """The highest-scoring wrong class (lowest index on ties)."""
    best = -1
    for r, score in enumerate(scores):
        if r != y and (best < 0 or score > scores[best]):
            best = r
    return best


def row_sums(products: np.ndarray, seg: np.ndarray, n: int) -> np.ndarray:
    """Row sums of float64 products (rows, nnz) -> (n, rows), left to right per row."""
    out = np.empty((n, len(products)), dtype=np.float64)
    for r in range(len(products)):
        out[:, r] = np.bincount(seg, weights=products[r], minlength=n)
    return out


def served_weights(
    weights: np.ndarray, accum: np.ndarray | None, idx: np.ndarray, counts: np.ndarray | float
) -> np.ndarray:
    """Served weights (rows, nnz) float64 at ``idx``; ``counts`` is c per nonzero."""
    gathered = weights.take(idx, axis=1).astype(np.float64)
    if accum is None:
        return gathered
    # c = 0 only before the first example, when u is still zero: dividing by 1 is exact.
    return gathered - accum.take(idx, axis=1).astype(np.float64) / np.maximum(counts, 1.0)


def train_margins(
    weights: np.ndarray, idx: np.ndarray, x: np.ndarray, seg: np.ndarray, n: int
) -> np.ndarray:
    """Training margins (n, rows) of the rows ``seg`` labels."""
    return row_sums(weights.take(idx, axis=1).astype(np.float64) * x, seg, n)


def serve_margins(
    weights: np.ndarray,
    accum: np.ndarray | None,
    idx: np.ndarray,
    x: np.ndarray,
    seg: np.ndarray,
    n: int,
    counts: np.ndarray | float,
) -> np.ndarray:
    """Served margins (n, rows); ``counts`` is the averaging count c (per nonzero or one)."""
    if accum is None:
        return train_margins(weights, idx, x, seg, n)
    return row_sums(served_weights(weights, accum, idx, counts) * x, seg, n)


def labels_of(margins: np.ndarray) -> np.ndarray:
    """The class int64[n] of margins (n, rows): positive iff > 0 (binary), else argmax."""
    if margins.shape[1] == 1:
        return (margins[:, 0] > 0).astype(np.int64)
    return np.argmax(margins, axis=1).astype(np.int64)


def fires(
    train: np.ndarray,
    ys: np.ndarray,
    nnz: np.ndarray,
    sq: np.ndarray,
    *,
    rule: str,
    margin: float,
) -> np.ndarray:
    """Which rows the rule would update on, given the training margins (n, rows)."""
    if train.shape[1] == 1:
        s = train[:, 0]
        sign = np.where(ys == 1, 1.0, -1.0)
        if rule == "margin":
            fire = sign * s <= margin
        elif rule == "passive_aggressive":
            return (1.0 - sign * s > 0) & (sq > 0)
        else:
            fire = np.where(ys == 1, s <= 0, s > 0)
    else:
        rows, masked = np.arange(ys.size), train.copy()
        masked[rows, ys] = -np.inf  # the rival is the best wrong class, lowest index on ties
        gap = train[rows, ys] - train[rows, np.argmax(masked, axis=1)]
        if rule == "margin":
            fire = gap <= margin
        elif rule == "passive_aggressive":
            return (1.0 - gap > 0) & (sq > 0)
        else:
            fire = np.argmax(train, axis=1) != ys
    return fire & (nnz > 0)


def fire_one(train: np.ndarray, y: int, nnz: int, sq: float, *, rule: str, margin: float) -> bool:
    """:func:`fires` for one row (rows,), in Python floats (the same IEEE double operations)."""
    t = train.tolist()
    if len(t) == 1:
        s, sign = t[0], (1.0 if y == 1 else -1.0)
        if rule == "margin":
            fire = sign * s <= margin
        elif rule == "passive_aggressive":
            return 1.0 - sign * s > 0 and sq > 0
        else:
            fire = s <= 0 if y == 1 else s > 0
    else:
        gap = t[y] - t[rival_one(t, y)]
        if rule == "margin":
            fire = gap <= margin
        elif rule == "passive_aggressive":
            return 1.0 - gap > 0 and sq > 0
        else:
            fire = t.index(max(t)) != y
    return fire and nnz > 0


def apply_update(
    weights: np.ndarray,
    accum: np.ndarray | None,
    idx: np.ndarray,
    x: np.ndarray,
    y: int,
    train: np.ndarray,
    sq: float,
    *,
    rule: str,
    aggressiveness: float,
    seen: int,
) -> None:
    """Update ``weights`` (and ``accum``) in place for one row the rule fired on.

    ``train`` is the row's training margins (rows,), ``sq`` its ||x||² (read only by the
    passive-aggressive step) and ``seen`` the examples learned before it (c of the averaging).
    """
    step = 1.0
    if len(weights) == 1:
        sign = 1.0 if y == 1 else -1.0
        if rule == "passive_aggressive":
            step = min(aggressiveness, (1.0 - sign * float(train[0])) / sq)
        changes = [(0, sign * step * x)]
    else:
        rival = rival_one(train.tolist(), y)
        if rule == "passive_aggressive":
            loss = 1.0 - (float(train[y]) - float(train[rival]))
            step = min(aggressiveness, loss / (2.0 * sq))
        delta = step * x
        changes = [(y, delta), (rival, -delta)]
    c = float(seen)
    for row, delta in changes:
        w = weights[row]
        w[idx] = (w[idx].astype(np.float64) + delta).astype(np.float32)
        if accum is not None:
            u = accum[row]
            u[idx] = (u[idx].astype(np.float64) + c * delta).astype(np.float32)
