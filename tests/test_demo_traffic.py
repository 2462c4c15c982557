"""The invented demo traffic ("Harbourside Swap").

Everything checked here is a property we chose for our own invented generator (its fraud rate,
its token budget, its campaign shift); the scenario and its data describe nothing real. The one
outside reference is scikit-learn: its FeatureHasher and an averaged perceptron
(SGDClassifier with the perceptron loss) stand in for the service's model to show that the
shift really hurts a model trained before it, and that the model recovers.
"""

from __future__ import annotations

import bisect
import collections
import json
import math
import re
from typing import Any

import numpy as np
import pytest

from thresher.demo_traffic import DEMO_MODEL, DEMO_SPEC, ListingTraffic

# Our reading of the features module's word rule: lower-cased runs of letters and digits.
WORD = re.compile(r"[^\W_]+")
SHIFT = 2000


def spec_tokens(spec: dict[str, Any], fields: dict[str, Any]) -> list[tuple[str, float]]:
    """Tokens of one event by the DEVELOPERS.md spec rules, written out independently."""
    out: dict[str, float] = {"^bias": 1.0}
    cross_values: dict[str, str] = {}
    for name, opts in spec["fields"].items():
        value = fields.get(name)
        if value is None:
            continue
        kind = opts["kind"]
        if kind == "categorical":
            out[f"{name}={value}"] = 1.0
            cross_values[name] = str(value)
        elif kind == "text":
            words = WORD.findall(str(value).lower())
            for n in range(1, opts.get("ngrams", 1) + 1):
                for i in range(len(words) - n + 1):
                    token = f"{name}:{' '.join(words[i : i + n])}"
                    out[token] = out.get(token, 0.0) + 1.0
        elif kind == "numeric":
            x = float(value)
            if opts.get("log1p"):
                x = math.log1p(x)
            if "clip" in opts:
                x = min(max(x, opts["clip"][0]), opts["clip"][1])
            if "buckets" in opts:
                token = f"{name}@{bisect.bisect_right(opts['buckets'], x)}"
                out[token] = 1.0
                cross_values[name] = token
            else:
                out[name] = x
        elif kind == "set":
            for member in value:
                out[f"{name}={member}"] = 1.0
    for cross in spec.get("crosses", []):
        if all(a in cross_values for a in cross):
            out["&".join(f"{a}={cross_values[a]}" for a in cross)] = 1.0
    return list(out.items())


def description_frequencies(events: list[tuple[str, dict[str, Any], str]]) -> dict[str, float]:
    """Share of events whose description holds each word."""
    counts = collections.Counter(
        w for _, fields, _ in events for w in set(WORD.findall(fields["description"].lower()))
    )
    return {w: c / len(events) for w, c in counts.items()}


def weighted_jaccard(a: dict[str, float], b: dict[str, float]) -> float:
    """Sum of minima over sum of maxima (the weighted Jaccard, or Ruzicka, similarity)."""
    keys = set(a) | set(b)
    top = sum(min(a.get(k, 0.0), b.get(k, 0.0)) for k in keys)
    return top / sum(max(a.get(k, 0.0), b.get(k, 0.0)) for k in keys)


@pytest.fixture(scope="module")
def stream() -> list[tuple[str, dict[str, Any], str]]:
    return ListingTraffic(seed=1, shift_at=SHIFT).batch(2 * SHIFT)


def test_the_scenario_says_it_is_invented() -> None:
    import thresher.demo_traffic as module

    assert module.__doc__ is not None
    assert "invented" in module.__doc__.lower()
    assert "none describes a real" in module.__doc__


def test_same_seed_same_traffic_other_seed_other_traffic() -> None:
    first = ListingTraffic(seed=5, shift_at=100).batch(300)
    again = ListingTraffic(seed=5, shift_at=100)
    assert [again.next_event() for _ in range(300)] == first
    other = ListingTraffic(seed=6, shift_at=100).batch(300)
    assert sum(a[1] != b[1] for a, b in zip(first, other, strict=True)) > 290
    assert [e[0] for e in first[:3]] == ["lst-000000", "lst-000001", "lst-000002"]
    assert len({e[0] for e in first}) == 300


def test_fields_have_the_declared_kinds(stream: list[tuple[str, dict[str, Any], str]]) -> None:
    kinds = {name: opts["kind"] for name, opts in DEMO_SPEC["fields"].items()}
    assert kinds["category"] == "categorical" and kinds["tags"] == "set"
    categories = set()
    for event_id, fields, label in stream:
        assert re.fullmatch(r"lst-\d{6}", event_id)
        assert label in DEMO_MODEL["classes"]
        assert set(fields) == set(kinds)
        for name, kind in kinds.items():
            value = fields[name]
            if kind in ("text", "categorical"):
                assert isinstance(value, str) and value, (name, value)
            elif kind == "numeric":
                assert isinstance(value, int | float) and not isinstance(value, bool)
                assert math.isfinite(value) and value >= 0, (name, value)
            else:
                assert isinstance(value, list) and value == sorted(set(value))
                assert all(isinstance(m, str) for m in value)
        assert fields["price"] > 0
        assert isinstance(fields["seller_age_days"], int) and isinstance(fields["photos"], int)
        assert fields["shipping"] in {"pickup", "post", "courier"}
        # Made-up region codes only, never a real country's name.
        assert re.fullmatch(r"R-[A-Z][a-z]+", fields["payout_country"])
        categories.add(fields["category"])
    assert len(categories) == 10
    json.dumps(stream)  # everything travels as JSON


def test_fraud_rate_in_band_before_and_after_the_shift(
    stream: list[tuple[str, dict[str, Any], str]],
) -> None:
    traffic = ListingTraffic(seed=1, shift_at=SHIFT)
    assert traffic.phase(SHIFT - 1) == "before" and traffic.phase(SHIFT) == "after"
    for part in (stream[:SHIFT], stream[SHIFT:]):
        rate = sum(label == "fraud" for *_, label in part) / len(part)
        # 12% fraud plus 2% flipped labels gives about 13.5%; the band allows sampling error.
        assert 0.10 <= rate <= 0.17, rate


def test_about_thirty_tokens_per_event(stream: list[tuple[str, dict[str, Any], str]]) -> None:
    counts = np.array([len(spec_tokens(DEMO_SPEC, f)) for _, f, _ in stream])
    assert 26 <= counts.mean() <= 34, counts.mean()
    assert counts.min() >= 15 and counts.max() <= 50


def test_the_featurizer_reads_every_event(stream: list[tuple[str, dict[str, Any], str]]) -> None:
    features = pytest.importorskip("thresher.features")
    spec = features.FeatureSpec.from_json(DEMO_SPEC)
    featurizer = features.Featurizer(spec, DEMO_MODEL["bits"], DEMO_MODEL["seed"], True)
    sample = [fields for _, fields, _ in stream[::8]]
    for fields in sample:
        tokens = featurizer.tokens(fields)
        assert 20 <= len(tokens) <= 45, len(tokens)
        # Outside the text fields the spec has one reading; ours must match the module's.
        text = ("title:", "description:")
        ours = {t for t, _ in spec_tokens(DEMO_SPEC, fields) if not t.startswith(text)}
        theirs = {t for t, _ in tokens if not t.startswith(text)}
        assert ours == theirs
    batch = featurizer.transform_batch(sample)
    assert len(batch.indptr) == len(sample) + 1


def test_the_shift_changes_fraud_wording_but_not_fine_wording(
    stream: list[tuple[str, dict[str, Any], str]],
) -> None:
    def part(lo: int, hi: int, label: str) -> dict[str, float]:
        return description_frequencies([e for e in stream[lo:hi] if e[2] == label])

    fraud = weighted_jaccard(part(0, SHIFT, "fraud"), part(SHIFT, 2 * SHIFT, "fraud"))
    fine = weighted_jaccard(part(0, SHIFT, "fine"), part(SHIFT, 2 * SHIFT, "fine"))
    assert fraud < 0.35, fraud
    assert fine > 0.8, fine


def test_a_model_trained_before_the_shift_stumbles_then_recovers(
    stream: list[tuple[str, dict[str, Any], str]],
) -> None:
    from sklearn.feature_extraction import FeatureHasher
    from sklearn.linear_model import SGDClassifier

    hasher = FeatureHasher(n_features=2 ** DEMO_MODEL["bits"], input_type="pair")
    x = hasher.transform([spec_tokens(DEMO_SPEC, f) for _, f, _ in stream])
    y = np.array([label == "fraud" for *_, label in stream], dtype=np.int64)
    model = SGDClassifier(loss="perceptron", learning_rate="constant", eta0=1.0, penalty=None,
                          average=True, random_state=0)  # fmt: skip
    wrong = np.zeros(len(y), dtype=bool)
    chunk = 20  # progressive validation: predict a chunk, then learn from it
    for start in range(0, len(y), chunk):
        rows = slice(start, start + chunk)
        if start:
            wrong[rows] = model.predict(x[rows]) != y[rows]
        model.partial_fit(x[rows], y[rows], classes=[0, 1])
    before = wrong[SHIFT - 500 : SHIFT].mean()
    just_after = wrong[SHIFT : SHIFT + 200].mean()
    later = wrong[2 * SHIFT - 500 :].mean()
    assert before < 0.05, before  # near the 2% label-noise floor
    assert just_after > 3 * before, (before, just_after)
    assert later < 0.7 * just_after, (just_after, later)


def test_bad_arguments_are_refused() -> None:
    with pytest.raises(ValueError, match="shift_at"):
        ListingTraffic(shift_at=-1)
    with pytest.raises(ValueError, match="fraud_rate"):
        ListingTraffic(fraud_rate=1.5)
    with pytest.raises(ValueError, match="n must be"):
        ListingTraffic().batch(-2)


def test_the_demo_model_matches_the_traffic() -> None:
    assert tuple(DEMO_MODEL["classes"]) == ListingTraffic.classes
    assert DEMO_MODEL["features"] is DEMO_SPEC
    assert DEMO_SPEC["strict"] is False
    assert json.loads(json.dumps(DEMO_MODEL)) == DEMO_MODEL
    for opts in DEMO_SPEC["fields"].values():
        edges = opts.get("buckets")
        if edges is not None:
            assert edges == sorted(edges)
