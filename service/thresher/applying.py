"""Applying label records to a model's learner and counters, strictly in log order.

:class:`Applying` is the part of :class:`~thresher.models.Model` that turns the records at the
log's next offsets into learning: featurize, predict then update (progressive validation),
count quality, remember applied ids, flag and explain mistakes, wake waiting requests.
:meth:`Applying.apply` takes one record; :meth:`Applying.apply_batch` takes a run of
consecutive records, featurizes them as one CSR batch and learns them through
:meth:`~thresher.learner.Learner.update_batch_explained`, with a bit-identical result: the same
weights, the same counters, the same recent mistakes explained with the same weights.
"""

from __future__ import annotations

import asyncio
import contextlib
import functools
import gc
import json
import logging
from collections.abc import Iterator, Sequence
from operator import itemgetter
from typing import TYPE_CHECKING, Any, NamedTuple

import numpy as np

from . import records
from .appliedids import AppliedIds
from .errors import InvalidEvent
from .features import Batch, Featurizer, SparseRow
from .learner import Learner
from .learner_kernels import served_weights
from .mistakes import RECENT_MISTAKES as RECENT_MISTAKES
from .mistakes import Mistakes, Unexplained
from .quality import Quality

if TYPE_CHECKING:
    from .models import ModelConfig

drift_logger = logging.getLogger("thresher.drift")
OUTCOMES_KEPT = 1 << 17  # applied offsets whose mistake flag a waiting label request can read


class BatchRow(NamedTuple):
    """Row ``i`` of a featurized batch, sliced out only when it is learned alone."""

    batch: Batch
    i: int


class Applying(Mistakes):
    """Log-order learning of a model; its state is set up by ``Model.__init__``."""

    name: str
    config: ModelConfig
    featurizer: Featurizer
    class_index: dict[str, int]
    learner: Learner
    quality: Quality
    applied: AppliedIds
    offset: int
    last_update: float
    exclude_sources: frozenset[str]
    apply_on_append: bool
    _outcomes: dict[int, bool]
    _waiters: dict[int, asyncio.Future[None]]

    @functools.cached_property
    def row_key(self) -> bytes:
        """The fingerprint of this model's featurizer, under which its records store rows."""
        config = self.config
        return records.fingerprint(
            self.featurizer.spec.to_json(), bits=config.bits, seed=config.seed, signed=config.signed
        )

    def apply(self, offset: int, record: dict[str, Any], row: Any = None) -> None:
        """Apply the record at ``offset`` (must be the next one) to learner and counters."""
        if offset != self.offset:
            raise RuntimeError(f"{self.name}: applying offset {offset}, expected {self.offset}")
        self.offset = offset + 1
        if isinstance(row, BatchRow):
            row = row.batch.row(row.i)
        elif row is None and record.get("row") is not None:
            row = SparseRow(*records.row(record))
        if record["source"] not in self.exclude_sources:
            self._learn(record, row)
        self._applied_through(offset, [record])

    def apply_batch(
        self, first: int, recs: Sequence[dict[str, Any]], rows: Sequence[Any] | None = None
    ) -> None:
        """Apply the records at offsets ``first, first + 1, ...``: the same as `apply` on each.

        ``rows`` optionally holds each record's featurized row (None where it has none), or
        is one :class:`~thresher.features.Batch` whose row ``k`` is that of ``recs[k]``.
        """
        if len(recs) <= 1:  # one record is cheaper on its own than through the batch machinery
            for record in recs:
                if isinstance(rows, Batch):
                    rows = [BatchRow(rows, 0)]
                self.apply(first, record, None if rows is None else rows[0])
            return
        if first != self.offset:
            raise RuntimeError(f"{self.name}: applying offset {first}, expected {self.offset}")
        whole = rows if isinstance(rows, Batch) else None
        given = None if rows is None or whole is not None else list(rows)
        # A class list never changes, so only a foreign record has a label it lacks.
        label_index = self.class_index.get
        found = [label_index(record["label"]) for record in recs]
        excluded = self.exclude_sources
        if excluded or None in found:
            learned = [k for k, y in enumerate(found)
                       if y is not None and recs[k]["source"] not in excluded]  # fmt: skip
            ys = [found[k] for k in learned]
        else:
            learned, ys = list(range(len(recs))), found
        if whole is not None and len(learned) == len(recs):  # a label request's own batch
            indptr, indices, values = whole
        else:
            if whole is not None:
                given = [BatchRow(whole, k) for k in range(len(recs))]
            learned, ys, (indptr, indices, values) = self._featurize_run(recs, given, learned, ys)
        if learned:
            keep = self._recent.maxlen or 0
            labels = np.array(ys, dtype=np.int64)
            steps, wrong, befores = _learn(self.learner, indptr, indices, values, labels, keep)
            run = recs if len(learned) == len(recs) else [recs[k] for k in learned]
            self._count_run(first, run, learned, ys, steps.predicted)
            for j in wrong:
                run[j]["_mistake"] = True
            for j, before in befores.items():
                a, b = int(indptr[j]), int(indptr[j + 1])
                row = SparseRow(indices[a:b].copy(), values[a:b].copy())  # not the whole batch
                predicted = int(steps.predicted[j])
                entry = self._mistake_entry(run[j], predicted, steps.margins[j], [])
                self._recent.appendleft(entry)
                self._unexplained.append(Unexplained(entry, run[j], row, before, predicted))
        self.offset = first + len(recs)
        self._applied_through(first, recs)

    def apply_payloads(self, first: int, payloads: Sequence[bytes]) -> None:
        """Decode and apply log payloads from offset ``first``.

        A corrupt payload raises :class:`~thresher.records.CorruptRecord` once the records
        before it are applied, as applying them one by one would.
        """
        with _collector_paused():
            recs, error = records.decode_many(payloads, self.row_key, self.config.bits)
            self.apply_batch(first, recs)
            del recs  # freed by reference counting while the collector is still paused
        if error is not None:
            raise error

    def _featurize_run(
        self,
        recs: Sequence[dict[str, Any]],
        given: list[Any] | None,
        learned: list[int],
        ys: list[int],
    ) -> tuple[list[int], list[int], tuple[np.ndarray, np.ndarray, np.ndarray]]:
        """The learned records' rows as one CSR batch; records whose fields fail are dropped.

        A row comes from the request that featurized it, else from the record (made under this
        model's featurizer, see `records`), else the record's fields are featurized now.
        """
        if given is None:
            kept = [recs[k].get("row") for k in learned]
            if None not in kept:  # replay and the follower: every row was stored
                return learned, ys, records.stack_rows(kept)
            given = [None] * len(recs)
        rows = dict(zip(learned, (given[k] for k in learned), strict=True))
        stored = [k for k in learned if rows[k] is None and recs[k].get("row") is not None]
        for k in stored:
            rows[k] = SparseRow(*records.row(recs[k]))
        missing = [k for k in learned if rows[k] is None]
        if len(missing) == len(learned):
            try:
                batch = self.featurizer.transform_batch(
                    [records.fields(recs[k]) for k in learned], path="fields"
                )
            except InvalidEvent:
                pass  # accepted under the same spec, so only a foreign log gets here
            else:
                return learned, ys, (batch.indptr, batch.indices, batch.values)
        if missing:
            try:
                batch = self.featurizer.transform_batch(
                    [records.fields(recs[k]) for k in missing], path="fields"
                )
                rows.update((k, BatchRow(batch, i)) for i, k in enumerate(missing))
            except InvalidEvent:
                for k in missing:
                    try:
                        rows[k] = self.featurizer.transform(records.fields(recs[k]), path="fields")
                    except InvalidEvent:
                        rows[k] = None  # skipped, as `apply` skips it
        kept = [(k, y) for k, y in zip(learned, ys, strict=True) if rows[k] is not None]
        csr = _stack([rows[k] for k, _ in kept])
        return [k for k, _ in kept], [y for _, y in kept], csr

    def _count_run(
        self,
        first: int,
        run: list[dict[str, Any]],
        learned: list[int],
        ys: list[int],
        predicted: np.ndarray,
    ) -> None:
        """`_count`'s counters, applied ids and drift alarms for a learned run of records."""
        guesses = predicted.tolist()
        sources = list(map(itemgetter("source"), run))
        times = list(map(itemgetter("time"), run))
        label_index = self.class_index.get
        served = [None if (c := r.get("served")) is None else label_index(c) for r in run]
        start = 0
        while start < len(run):
            fired = self.quality.record_many(
                ys[start:],
                guesses[start:],
                sources=sources[start:],
                served=served[start:],
                times=times[start:],
            )
            if fired is None:
                break
            start += fired + 1
            self.offset = first + learned[start - 1] + 1  # the offset the alarm fired at
            self._log_drift()
        # One call for the run: the index sets them in order, in its compiled batch path.
        self.applied.update(
            [(i, y) for i, y in zip(map(itemgetter("id"), run), ys, strict=True) if i is not None]
        )
        self.last_update = float(times[-1] or 0.0)

    def _applied_through(self, first: int, recs: Sequence[dict[str, Any]]) -> None:
        """After records from ``first`` are applied: keep their outcomes, wake their waiters."""
        if not self.apply_on_append:  # the records a follower decodes are not the request's
            for k, record in enumerate(recs):
                self._outcomes[first + k] = bool(record.get("_mistake"))
                self._outcomes.pop(first + k - OUTCOMES_KEPT, None)
        if self._waiters:
            for waiting in [o for o in self._waiters if o < self.offset]:
                future = self._waiters.pop(waiting)
                if not future.done():
                    future.set_result(None)

    def _learn(self, record: dict[str, Any], row: Any) -> None:
        y = self.class_index.get(record["label"])
        if y is None:  # a class list never changes, so only a foreign record gets here
            return
        if row is None:
            try:
                row = self.featurizer.transform(records.fields(record), path="fields")
            except InvalidEvent:
                return  # accepted under the same spec, so unreachable unless the log is foreign
        # Explain a mistake with the weights that made it: gather them before the update
        # (a cheap take over this row's slots), turn them into tokens only on a mistake.
        learner = self.learner
        before = served_weights(learner.weights_, learner.accum_, row.indices, float(learner.seen))
        update = learner.update(row.indices, row.values, y)
        self._count(record, y, update.predicted, update.mistake, update.margins, row, before)

    def _count(
        self,
        record: dict[str, Any],
        y: int,
        predicted: int,
        mistake: bool,
        margins: np.ndarray,
        row: Any,
        before: np.ndarray | None,
    ) -> None:
        """Everything but the weights that learning one record changes."""
        served = record.get("served")
        alarm = self.quality.record(
            y,
            predicted,
            source=record["source"],
            served=None if served is None else self.class_index.get(served),
            time=record.get("time"),
        )
        if alarm:
            self._log_drift()
        event_id = record.get("id")
        if event_id is not None:
            self.applied[event_id] = y
        self.last_update = float(record.get("time") or 0.0)
        if mistake:
            record["_mistake"] = True
            # A batch keeps weights only for mistakes that stay among the recent ones.
            if before is not None:
                top = self._explain_before(record, row, before, predicted)
                self.recent_mistakes.appendleft(
                    self._mistake_entry(record, predicted, margins, top)
                )

    def _log_drift(self) -> None:
        report = self.quality.report()
        event = {
            "event": "drift_alarm",
            "model": self.name,
            "offset": self.offset,
            "labelled": report["labelled"],
            "mistake_rate": report["mistake_rate"],
            "alarms": report["drift"]["alarms"],
        }
        drift_logger.warning("drift alarm %s", json.dumps(event, sort_keys=True))


@contextlib.contextmanager
def _collector_paused() -> Iterator[None]:
    """Keep the cyclic garbage collector out of a run's decode and apply.

    A run allocates tens of thousands of containers (records, their fields) that all live
    until it ends, so every collection in between traverses them for nothing; they contain no
    cycles and are freed by reference counting when the run is done.
    """
    if not gc.isenabled():
        yield
        return
    gc.disable()
    try:
        yield
    finally:
        gc.enable()


def _stack(rows: list[Any]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One CSR batch (indptr, indices, values) of rows given as SparseRow or BatchRow."""
    sizes: list[np.ndarray] = []
    indices: list[np.ndarray] = [np.zeros(0, dtype=np.int64)]
    values: list[np.ndarray] = [np.zeros(0, dtype=np.float32)]
    k = 0
    while k < len(rows):
        row = rows[k]
        if not isinstance(row, BatchRow):
            sizes.append(np.array([row.indices.size], dtype=np.int64))
            indices.append(row.indices)
            values.append(row.values)
            k += 1
            continue
        # Rows of one batch, consecutive here and rising there, are cut out together.
        batch, start = row.batch, k
        k += 1
        while k < len(rows) and isinstance(rows[k], BatchRow) and rows[k].batch is batch:
            if rows[k].i <= rows[k - 1].i:
                break
            k += 1
        picked = np.fromiter((r.i for r in rows[start:k]), dtype=np.int64, count=k - start)
        lengths = np.diff(batch.indptr)
        if picked[-1] - picked[0] == k - start - 1:  # a contiguous range of the batch
            a, b = int(batch.indptr[picked[0]]), int(batch.indptr[picked[-1] + 1])
            indices.append(batch.indices[a:b])
            values.append(batch.values[a:b])
        else:
            chosen = np.zeros(lengths.size, dtype=bool)
            chosen[picked] = True
            mask = np.repeat(chosen, lengths)
            indices.append(batch.indices[mask])
            values.append(batch.values[mask])
        sizes.append(lengths[picked])
    indptr = np.zeros(len(rows) + 1, dtype=np.int64)
    if sizes:
        np.cumsum(np.concatenate(sizes), out=indptr[1:])
    return indptr, np.concatenate(indices), np.concatenate(values)


def _learn(
    learner: Learner,
    indptr: np.ndarray,
    indices: np.ndarray,
    values: np.ndarray,
    ys: np.ndarray,
    keep: int,
) -> tuple[Any, list[int], dict[int, np.ndarray]]:
    """Learn a CSR batch in order: its steps, the row numbers of its mistakes, and the served
    weights (rows, nnz) behind its last ``keep`` mistakes, by row number, as they were when
    each was predicted."""
    if keep <= 0:
        steps = learner.update_batch(indptr, indices, values, ys)
        return steps, np.flatnonzero(steps.mistakes).tolist(), {}
    steps, before = learner.update_batch_explained(indptr, indices, values, ys)
    wrong = np.flatnonzero(steps.mistakes).tolist()
    ends = indptr.tolist() if wrong else []
    return steps, wrong, {j: before[:, ends[j] : ends[j + 1]].copy() for j in wrong[-keep:]}
