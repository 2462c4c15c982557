"""Figures 1-3: learning and scoring inside one process, thresher's core against scikit-learn.

Both sides see the same demo listings in the same order. thresher runs the path a model runs:
``Featurizer.transform_batch`` (or ``transform`` for one event) and ``Learner.update_batch``
(or ``update``), with the rule ``classic``; scikit-learn tokenises in plain Python
(:mod:`bench.peer_tokens`), hashes with ``FeatureHasher`` and learns with
``Perceptron.partial_fit``. The featurizer's token cache is warmed once, as a running model's is.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from thresher.demo_traffic import DEMO_SPEC
from thresher.features import FeatureSpec, Featurizer
from thresher.learner import Learner

from . import peer_tokens
from .common import BITS, SEED, Mode, demo_events, median, rates, row

BATCH = 1000  # events per in-process batch call, on both sides
PEER_SINGLE = {"quick": 150, "full": 500}  # scikit-learn's one-event calls are slow
SINGLE = {"quick": 2000, "full": 5000}


class Workload:
    """The events, their labels and a warmed featurizer, shared by figures 1-3."""

    def __init__(self, n: int) -> None:
        listings = demo_events(n, seed=1)
        self.fields = [fields for _, fields, _ in listings]
        self.ys = np.array([1 if label == "fraud" else 0 for _, _, label in listings])
        self.featurizer = Featurizer(FeatureSpec.from_json(DEMO_SPEC), BITS, SEED, True)
        self.featurizer.transform_batch(self.fields[:2000])
        self.chunks = [(lo, min(lo + BATCH, n)) for lo in range(0, n, BATCH)]
        self.hasher = peer_tokens.hasher(BITS)

    def tokens_per_event(self) -> tuple[float, float]:
        sample = self.fields[:1000]
        ours = np.mean([len(self.featurizer.tokens(f)) for f in sample])
        theirs = np.mean([len(peer_tokens.tokens(f)) for f in sample])
        return float(ours), float(theirs)

    # -- thresher --------------------------------------------------------------------------

    def learn_batches(self) -> Learner:
        learner = Learner(2, BITS, rule="classic")
        for lo, hi in self.chunks:
            batch = self.featurizer.transform_batch(self.fields[lo:hi])
            learner.update_batch(batch.indptr, batch.indices, batch.values, self.ys[lo:hi])
        return learner

    def learn_singly(self, n: int) -> None:
        learner = Learner(2, BITS, rule="classic")
        transform, update = self.featurizer.transform, learner.update
        for fields, y in zip(self.fields[:n], self.ys[:n].tolist(), strict=True):
            row_ = transform(fields)
            update(row_.indices, row_.values, y)

    def score_from_fields(self, learner: Learner) -> None:
        for lo, hi in self.chunks:
            batch = self.featurizer.transform_batch(self.fields[lo:hi])
            learner.score_batch(batch.indptr, batch.indices, batch.values)

    # -- scikit-learn ----------------------------------------------------------------------

    def peer_matrix(self, lo: int, hi: int) -> Any:
        return self.hasher.transform([peer_tokens.tokens(f) for f in self.fields[lo:hi]])

    def peer_learn_batches(self) -> Any:
        model = peer_tokens.perceptron()
        for lo, hi in self.chunks:
            model.partial_fit(self.peer_matrix(lo, hi), self.ys[lo:hi], classes=[0, 1])
        return model

    def peer_learn_singly(self, n: int) -> None:
        model = peer_tokens.perceptron()
        model.partial_fit(self.peer_matrix(0, 1), self.ys[:1], classes=[0, 1])
        for i in range(1, n):
            model.partial_fit(self.peer_matrix(i, i + 1), self.ys[i : i + 1])


def _interleaved(
    n: int, ours: Callable[[], object], theirs: Callable[[], object], repeats: int
) -> tuple[list[float], list[float]]:
    """Rates of both sides, alternating runs so a noisy neighbour hits both alike."""
    a: list[float] = []
    b: list[float] = []
    for _ in range(repeats):
        a += rates(n, ours, 1)
        b += rates(n, theirs, 1)
    return a, b


def run(mode: Mode) -> list[dict[str, Any]]:
    """Rows for figures 1, 2 and 3."""
    repeats = max(3, mode.repeats + 2)
    work = Workload(mode.events)
    n = mode.events
    ours_tok, their_tok = work.tokens_per_event()
    tok_note = f"tokens/event: thresher {ours_tok:.1f}, peer tokeniser {their_tok:.1f}"
    rows = []

    a, b = _interleaved(n, work.learn_batches, work.peer_learn_batches, repeats)
    rows.append(
        row(
            "1. batch learning (featurize + update_batch)",
            median(a),
            "events/s",
            peer=median(b),
            peer_name="sklearn FeatureHasher + Perceptron.partial_fit",
            target=("ratio>=", 1.5),
            note=f"{n} events in batches of {BATCH}, rule classic, bits {BITS}; {tok_note}",
            samples=a,
            peer_samples=b,
        )
    )

    single, peer_single = SINGLE[mode.name], PEER_SINGLE[mode.name]
    a = [single * r for r in rates(1, lambda: work.learn_singly(single), repeats)]
    b = [peer_single * r for r in rates(1, lambda: work.peer_learn_singly(peer_single), repeats)]
    rows.append(
        row(
            "2. one-event learning (transform + update)",
            median(a),
            "events/s",
            peer=median(b),
            peer_name="sklearn partial_fit per event",
            target=("ratio>=", 50.0),
            note=f"thresher {single} events per pass, scikit-learn {peer_single} (it is slow)",
            samples=a,
            peer_samples=b,
        )
    )

    learner = work.learn_batches()
    peer = work.peer_learn_batches()
    batches = [work.featurizer.transform_batch(work.fields[lo:hi]) for lo, hi in work.chunks]
    matrices = [work.peer_matrix(lo, hi) for lo, hi in work.chunks]

    def score_hashed() -> None:
        for batch in batches:
            learner.score_batch(batch.indptr, batch.indices, batch.values)

    def peer_score_hashed() -> None:
        for matrix in matrices:
            peer.decision_function(matrix)

    def score_fields() -> None:
        work.score_from_fields(learner)

    def peer_score_fields() -> None:
        for lo, hi in work.chunks:
            peer.decision_function(work.peer_matrix(lo, hi))

    a, b = _interleaved(n, score_hashed, peer_score_hashed, repeats)
    rows.append(
        row(
            "3a. batch scoring, score_batch on pre-hashed rows",
            median(a),
            "events/s",
            peer=median(b),
            peer_name="sklearn decision_function on the hashed matrix",
            target=("value>=", 200_000),
            note=f"batches of {BATCH} already hashed; the peer scores its own hashed matrix",
            samples=a,
            peer_samples=b,
        )
    )
    a, b = _interleaved(n, score_fields, peer_score_fields, repeats)
    rows.append(
        row(
            "3b. batch scoring, featurize + score_batch",
            median(a),
            "events/s",
            peer=median(b),
            peer_name="sklearn tokenise + FeatureHasher + decision_function",
            target=("value>=", 200_000),
            note=f"batches of {BATCH} from fields; the same target as 3a, the whole path",
            samples=a,
            peer_samples=b,
        )
    )
    return rows
