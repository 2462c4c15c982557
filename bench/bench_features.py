"""Featurizer throughput on the invented demo listings (about 30 tokens per event).

Run: ``python -m bench.bench_features [--events N] [--repeat R]``. Prints events per second for
``transform_batch`` (fields to CSR, hashing included), ``transform`` one event at a time, and,
as the peer ratio, scikit-learn's FeatureHasher on the same (token, value) pairs made ahead.
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable

from thresher.demo_traffic import DEMO_MODEL, DEMO_SPEC, ListingTraffic
from thresher.features import FeatureSpec, Featurizer


def best_rate(n: int, run: Callable[[], object], repeat: int) -> float:
    """Events per second of the fastest of ``repeat`` runs over ``n`` events."""
    best = float("inf")
    for _ in range(repeat):
        start = time.perf_counter()
        run()
        best = min(best, time.perf_counter() - start)
    return n / best


def main(argv: list[str] | None = None) -> None:
    """Measure and print the figures."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=5000)
    parser.add_argument("--repeat", type=int, default=7)
    args = parser.parse_args(argv)

    from sklearn.feature_extraction import FeatureHasher

    traffic = ListingTraffic(seed=1)
    events = [traffic.next_event()[1] for _ in range(args.events)]
    featurizer = Featurizer(FeatureSpec.from_json(DEMO_SPEC), DEMO_MODEL["bits"], 0, True)
    featurizer.transform_batch(events)  # warm the token cache, as a running model has it
    tokens = [featurizer.tokens(e) for e in events]
    per_event = sum(map(len, tokens)) / len(tokens)
    peer = FeatureHasher(n_features=2 ** DEMO_MODEL["bits"], input_type="pair")

    batch = best_rate(len(events), lambda: featurizer.transform_batch(events), args.repeat)
    single = best_rate(len(events), lambda: [featurizer.transform(e) for e in events], args.repeat)
    theirs = best_rate(len(events), lambda: peer.transform(tokens), args.repeat)
    print(f"events: {len(events)}, tokens per event: {per_event:.1f}")
    print(f"transform_batch: {batch:,.0f} events/s")
    print(f"transform (one at a time): {single:,.0f} events/s")
    print(f"scikit-learn FeatureHasher on ready-made tokens: {theirs:,.0f} events/s")
    print(f"ratio transform_batch / FeatureHasher: {batch / theirs:.2f}")


if __name__ == "__main__":
    main()
