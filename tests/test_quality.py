"""Progressive-validation counters against hand-computed values and scikit-learn's metrics, and
the Page–Hinkley drift test on generated mistake streams."""

from __future__ import annotations

import itertools
import json
import math
import os
from typing import Any

import msgpack
import numpy as np
import pytest
from sklearn.metrics import confusion_matrix, f1_score, precision_score, recall_score

from thresher import quality_runs
from thresher.errors import InvalidConfig, InvalidInput
from thresher.quality import MAX_ALARMS_KEPT, MAX_SOURCES, DriftParams, Quality

# A hand-checked binary stream of (truth, predicted); outcomes TN FP TP FN TP TN FP TP.
LITERAL = [(0, 0), (0, 1), (1, 1), (1, 0), (1, 1), (0, 0), (0, 1), (1, 1)]


def test_literal_binary_stream_hand_computed() -> None:
    # Check source: hand-computed from the definitions (precision tp/(tp+fp), recall
    # tp/(tp+fn), F1 2tp/(2tp+fp+fn)) over the eight outcomes above.
    q = Quality(["ok", "fraud"], windows=(3, 5))
    for t, p in LITERAL:
        q.record(t, p, source="review")
    r = q.report()
    assert r["labelled"] == 8 and r["mistakes"] == 3
    assert r["confusion"]["truth_by_predicted"] == [[2, 2], [1, 3]]
    assert r["confusion"]["classes"] == ["ok", "fraud"]
    assert (r["false_positives"], r["false_negatives"]) == (2, 1)
    # all: tp=3 fp=2 fn=1; last 5 (FN TP TN FP TP): tp=2 fp=1 fn=1;
    # last 3 (TN FP TP): tp=1 fp=1 fn=0.
    assert r["mistake_rate"]["all"] == 3 / 8
    assert r["mistake_rate"]["last_5"] == 2 / 5
    assert r["mistake_rate"]["last_3"] == 1 / 3
    assert r["precision"] == {"all": 3 / 5, "last_3": 1 / 2, "last_5": 2 / 3}
    assert r["recall"] == {"all": 3 / 4, "last_3": 1.0, "last_5": 2 / 3}
    assert r["f1"] == {"all": 6 / 9, "last_3": 2 / 3, "last_5": 4 / 6}
    assert r["by_source"] == {"review": 8} and r["by_source_mistakes"] == {"review": 3}
    json.dumps(r, allow_nan=False)  # JSON-ready as it stands


def test_rates_are_null_before_anything_is_counted() -> None:
    r = Quality(["a", "b"]).report()
    assert r["mistake_rate"] == {"all": None, "last_1000": None, "last_10000": None,
                                 "decayed": None}  # fmt: skip
    assert r["served"]["mistake_rate"] is None
    assert r["precision"]["all"] is None and r["recall"]["all"] is None and r["f1"]["all"] is None
    q = Quality(["a", "b"])
    q.record(0, 0, source="s")  # one true negative: no positives anywhere yet
    r = q.report()
    assert r["mistake_rate"]["all"] == 0.0
    assert r["precision"]["all"] is None and r["recall"]["all"] is None and r["f1"]["all"] is None
    multi = Quality(["a", "b", "c"]).report()
    assert multi["per_class"]["c"] == {"precision": None, "recall": None, "f1": None, "support": 0}
    assert "precision" not in multi


def test_decayed_rate_follows_the_half_life() -> None:
    # Check source: hand-computed; a weight of 2**(-1/h) per label halves a mistake's weight
    # after h labels, and the rate divides by the equally decayed label count.
    q = Quality(["a", "b"], half_life=4.0)
    q.record(0, 1, source="s")
    for _ in range(4):
        q.record(0, 0, source="s")
    assert q.decayed[0] == pytest.approx(0.5, rel=1e-12)
    lam = 2 ** (-1 / 4)
    expected = lam**4 / sum(lam**k for k in range(5))
    assert q.report()["mistake_rate"]["decayed"] == pytest.approx(expected, rel=1e-12)


def _random_stream(seed: int, n: int, k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    truth = rng.integers(0, k, n)
    flip = rng.random(n) < 0.3
    predicted = np.where(flip, rng.integers(0, k, n), truth)
    served = np.where(rng.random(n) < 0.5, -1, np.where(rng.random(n) < 0.2, 1 - truth % 2, truth))
    return truth, predicted, served


def test_binary_counters_match_scikit_learn_metrics() -> None:
    # Check source: sklearn.metrics precision_score / recall_score / f1_score /
    # confusion_matrix on the same pairs, for all labels and for each window's last n.
    truth, predicted, served = _random_stream(1, 2500, 2)
    q = Quality(["no", "yes"], windows=(100, 1000))
    for i in range(truth.size):
        s = None if served[i] < 0 else int(served[i])
        q.record(int(truth[i]), int(predicted[i]), source=f"s{i % 3}", served=s)
    r = q.report()
    for name, n in (("all", truth.size), ("last_100", 100), ("last_1000", 1000)):
        t, p = truth[-n:], predicted[-n:]
        assert r["precision"][name] == pytest.approx(precision_score(t, p), rel=1e-12)
        assert r["recall"][name] == pytest.approx(recall_score(t, p), rel=1e-12)
        assert r["f1"][name] == pytest.approx(f1_score(t, p), rel=1e-12)
        assert r["mistake_rate"][name] == pytest.approx(float(np.mean(t != p)), rel=1e-12)
    assert r["confusion"]["truth_by_predicted"] == confusion_matrix(truth, predicted).tolist()
    has = served >= 0
    assert r["served"]["labelled"] == int(has.sum())
    assert r["served"]["mistakes"] == int(np.sum(truth[has] != served[has]))
    assert (
        r["served"]["confusion"]["truth_by_predicted"]
        == confusion_matrix(truth[has], served[has], labels=[0, 1]).tolist()
    )
    assert r["by_source"] == {
        f"s{j}": int(np.sum(np.arange(truth.size) % 3 == j)) for j in range(3)
    }


def test_multi_class_counters_match_scikit_learn_metrics() -> None:
    # Check source: sklearn.metrics with average=None gives the per-class figures.
    truth, predicted, _ = _random_stream(2, 1500, 4)
    names = ["w", "x", "y", "z"]
    q = Quality(names, windows=(50, 500))
    for t, p in zip(truth.tolist(), predicted.tolist(), strict=True):
        q.record(t, p, source="s")
    r = q.report()
    precision = precision_score(truth, predicted, average=None)
    recall = recall_score(truth, predicted, average=None)
    f1 = f1_score(truth, predicted, average=None)
    for j, name in enumerate(names):
        cls = r["per_class"][name]
        assert cls["precision"] == pytest.approx(precision[j], rel=1e-12)
        assert cls["recall"] == pytest.approx(recall[j], rel=1e-12)
        assert cls["f1"] == pytest.approx(f1[j], rel=1e-12)
        assert cls["support"] == int(np.sum(truth == j))
    for n in (50, 500):
        want = float(np.mean(truth[-n:] != predicted[-n:]))
        assert r["mistake_rate"][f"last_{n}"] == pytest.approx(want, rel=1e-12)
    assert r["confusion"]["truth_by_predicted"] == confusion_matrix(truth, predicted).tolist()


def test_history_is_sampled_and_decimated() -> None:
    q = Quality(["a", "b"], windows=(20,), history_every=10, history_max=8)
    rng = np.random.default_rng(4)
    rates_at: dict[int, dict[str, Any]] = {}
    for i in range(1, 401):
        q.record(int(rng.integers(2)), int(rng.integers(2)), source="s", time=1000.0 + i)
        rates_at[i] = q.mistake_rates()
    points = q.report()["history"]
    positions = [p["labelled"] for p in points]
    assert 4 <= len(points) <= 8
    step = positions[1] - positions[0]
    assert positions == list(range(step, 401, step))[: len(points)]  # evenly spaced
    assert step % 10 == 0 and positions[-1] > 400 - step
    for p in points:
        assert p["time"] == 1000.0 + p["labelled"]
        assert {k: p[k] for k in ("all", "last_20", "decayed")} == rates_at[p["labelled"]]


# -- drift (generated streams: seeded draws, not real data) ---------------------------------


def _mistakes(rng: np.random.Generator, rate: float, n: int) -> list[bool]:
    return (rng.random(n) < rate).tolist()


def _feed(q: Quality, stream: list[bool]) -> list[int]:
    return [q.labelled for mistake in stream if q.record(1, 0 if mistake else 1, source="g")]


def test_page_hinkley_statistic_hand_computed() -> None:
    # Check source: Page (1954) statistic computed by hand with delta = 0 and no fading on the
    # stream 0, 0, 1, 1: means 0, 0, 1/3, 1/2; m = 0, 0, 2/3, 7/6; min 0; PH = 7/6.
    q = Quality(["a", "b"], drift=DriftParams(delta=0.0, alpha=1.0))
    _feed(q, [False, False, True, True])
    assert q.report()["drift"]["statistic"] == pytest.approx(7 / 6, rel=1e-12)


@pytest.mark.parametrize(("min_samples", "first"), [(1, 3), (50, 50)])
def test_drift_waits_for_min_samples(min_samples: int, first: int) -> None:
    # Check source: hand-computed with delta = 0, no fading, stream 0, 1, 1, ...: m_t is
    # 1/2 + 1/3 + ... + 1/t (rising, so PH = m), first above 0.5 at t = 3 (0.83).
    q = Quality(["a", "b"], drift=DriftParams(delta=0.0, threshold=0.5, min_samples=min_samples,
                                              alpha=1.0))  # fmt: skip
    assert _feed(q, [False] + [True] * 60)[0] == first


@pytest.mark.parametrize("seed", range(5))
def test_drift_fires_soon_after_the_mistake_rate_jumps(seed: int) -> None:
    # Generated stream: 3,000 labels at a 5% mistake rate, then 30%.
    rng = np.random.default_rng(seed)
    q = Quality(["a", "b"])
    assert _feed(q, _mistakes(rng, 0.05, 3000)) == []
    alarms = _feed(q, _mistakes(rng, 0.30, 1000))
    assert alarms and alarms[0] - 3000 <= 500, alarms
    r = q.report()["drift"]
    assert r["alarm_at"] == alarms and r["alarms"] == len(alarms)
    assert r["threshold"] == DriftParams().threshold


@pytest.mark.parametrize("seed", range(3))
def test_drift_stays_quiet_on_a_stable_stream(seed: int) -> None:
    # Generated stream: 20,000 labels at a steady 10% mistake rate.
    q = Quality(["a", "b"])
    assert _feed(q, _mistakes(np.random.default_rng(100 + seed), 0.10, 20000)) == []
    assert 0 <= q.report()["drift"]["statistic"] < DriftParams().threshold


def test_drift_resets_after_an_alarm_and_keeps_the_last_alarms() -> None:
    # Generated stream: runs of 20 right then 20 wrong, with a low threshold, so it alarms
    # on every wrong run; each alarm restarts the test, so the next waits min_samples labels.
    q = Quality(["a", "b"], drift=DriftParams(threshold=2.0, min_samples=5, alpha=1.0))
    alarms = []
    for i in range(8000):
        if q.record(1, 0 if (i // 20) % 2 else 1, source="g"):
            alarms.append(q.labelled)
            assert q.report()["drift"]["statistic"] == 0.0 and q.ph["n"] == 0
    assert len(alarms) > MAX_ALARMS_KEPT
    assert min(np.diff(alarms)) >= 5
    r = q.report()["drift"]
    assert r["alarms"] == len(alarms)
    assert r["alarm_at"] == alarms[-MAX_ALARMS_KEPT:]


# -- state ---------------------------------------------------------------------------------


def _stream_into(q: Quality, seed: int, n: int, time0: float = 0.0) -> None:
    truth, predicted, served = _random_stream(seed, n, len(q.classes))
    for i in range(n):
        s = None if served[i] < 0 else int(served[i]) % len(q.classes)
        q.record(int(truth[i]), int(predicted[i]), source=f"s{i % 2}", served=s, time=time0 + i)


@pytest.mark.parametrize("classes", [["a", "b"], ["a", "b", "c"]])
def test_state_round_trip_through_msgpack(classes: list[str]) -> None:
    q = Quality(classes, windows=(7, 40), history_every=5, history_max=6)
    _stream_into(q, 3, 300)
    blob = msgpack.packb(q.state(), use_bin_type=True)
    back = Quality.from_state(msgpack.unpackb(blob, raw=False))
    assert back.state() == q.state()
    assert back.report() == q.report()
    assert back.counters_digest() == q.counters_digest()
    _stream_into(q, 4, 100)
    _stream_into(back, 4, 100)
    assert back.state() == q.state()


def test_counters_digest_ignores_times_but_not_counts() -> None:
    a, b, c = (Quality(["a", "b"], history_every=10) for _ in range(3))
    _stream_into(a, 5, 200, time0=0.0)
    _stream_into(b, 5, 200, time0=5000.0)
    _stream_into(c, 5, 199)
    assert a.counters_digest() == b.counters_digest()
    assert a.report()["history"] != b.report()["history"]
    c.record(1, 1, source="s0")
    assert c.counters_digest() != a.counters_digest()
    assert len(a.counters_digest()) == 64 and int(a.counters_digest(), 16) >= 0


# -- bad input -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("kwargs", "path"),
    [
        ({"classes": ["a"]}, "classes"),
        ({"classes": ["a", "a"]}, "classes"),
        ({"windows": ()}, "windows"),
        ({"windows": (0,)}, "windows"),
        ({"half_life": 0.0}, "half_life"),
        ({"half_life": math.inf}, "half_life"),
        ({"history_every": 0}, "history_every"),
    ],
)
def test_bad_config_names_the_field(kwargs: dict[str, Any], path: str) -> None:
    with pytest.raises(InvalidConfig) as err:
        Quality(**{"classes": ["a", "b"], **kwargs})
    assert err.value.path == path


@pytest.mark.parametrize(
    ("kwargs", "path"),
    [
        ({"alpha": 0.0}, "drift.alpha"),
        ({"alpha": 1.5}, "drift.alpha"),
        ({"threshold": 0.0}, "drift.threshold"),
        ({"delta": -0.1}, "drift.delta"),
        ({"min_samples": 0}, "drift.min_samples"),
    ],
)
def test_bad_drift_params_name_the_field(kwargs: dict[str, Any], path: str) -> None:
    with pytest.raises(InvalidConfig) as err:
        DriftParams(**kwargs)
    assert err.value.path == path


def test_bad_records_and_states_are_rejected() -> None:
    q = Quality(["a", "b"])
    for kwargs, path in (
        ({"truth": 2, "predicted": 0}, "truth"),
        ({"truth": 0, "predicted": -1}, "predicted"),
        ({"truth": True, "predicted": 0}, "truth"),
        ({"truth": 0, "predicted": 0, "served": 5}, "served"),
    ):
        with pytest.raises(InvalidInput) as err:
            q.record(**kwargs, source="s")
        assert err.value.path == path
    assert q.labelled == 0
    q.record(np.int64(1), np.int64(1), source="s")  # numpy integers are class indices too
    state = q.state()
    with pytest.raises(InvalidConfig) as cfg:
        Quality.from_state({**state, "ring": b"\x00" * 3})
    assert cfg.value.path == "ring"
    with pytest.raises(InvalidConfig) as cfg:
        Quality.from_state({**state, "labelled": 7})
    assert cfg.value.path == "confusion"
    with pytest.raises(InvalidConfig) as cfg:
        Quality.from_state({k: v for k, v in state.items() if k != "ph"})
    assert cfg.value.path == "ph"


# -- counting a run at once ------------------------------------------------------------------


def _run_of(seed: int, n: int, k: int) -> dict[str, list[Any]]:
    # Generated: a 5% mistake rate that jumps to 40% half way (so drift alarms fire), sources
    # past MAX_SOURCES (so "(other)" is used), served labels on a third of the rows.
    rng = np.random.default_rng(seed)
    truths = rng.integers(k, size=n).tolist()
    wrong = rng.random(n) < np.where(np.arange(n) < n // 2, 0.05, 0.40)
    shift = rng.integers(1, k, size=n)
    predicted = np.where(wrong, (np.asarray(truths) + shift) % k, truths).tolist()
    served = [int(s) if i % 3 == 0 else None for i, s in enumerate(rng.integers(k, size=n))]
    sources = [f"s{i % (MAX_SOURCES + 30)}" for i in range(n)]
    return {"truths": truths, "predicted": predicted, "sources": sources, "served": served,
            "times": [1000.0 + i for i in range(n)]}  # fmt: skip


def _one_by_one(q: Quality, run: dict[str, list[Any]]) -> list[int]:
    fired = []
    for i, truth in enumerate(run["truths"]):
        if q.record(truth, run["predicted"][i], source=run["sources"][i],
                    served=run["served"][i], time=run["times"][i]):  # fmt: skip
            fired.append(i)
    return fired


def _at_once(q: Quality, run: dict[str, list[Any]], cuts: list[int]) -> list[int]:
    """record_many over pieces of the run cut at ``cuts``, resumed after every alarm."""
    fired, bounds = [], [0, *cuts, len(run["truths"])]
    for lo, hi in itertools.pairwise(bounds):
        while lo < hi:
            part = {key: values[lo:hi] for key, values in run.items()}
            at = q.record_many(part["truths"], part["predicted"], sources=part["sources"],
                               served=part["served"], times=part["times"])  # fmt: skip
            if at is None:
                break
            fired.append(lo + at)
            lo += at + 1
    return fired


@pytest.mark.parametrize("native", [True, False])
@pytest.mark.parametrize(
    ("k", "cuts"), [(2, []), (2, [1, 2, 700, 2500]), (3, [999, 1000]), (64, [5]), (65, [5])]
)
def test_record_many_counts_as_record_does_one_by_one(
    k: int, cuts: list[int], native: bool
) -> None:
    # record_many's compiled loop (_quality.c) and its Python loop, each against `record`.
    if native and quality_runs._quality is None:
        if os.environ.get("CI"):
            pytest.fail("thresher._quality is not built; pip install the package")
        pytest.skip("thresher._quality is not built")
    run = _run_of(k, 6000, k)
    drift = DriftParams(threshold=8.0, min_samples=20)
    one = Quality([f"c{j}" for j in range(k)], windows=(50, 700), drift=drift, history_every=7,
                  history_max=20)  # fmt: skip
    many = Quality.from_state(one.state())
    many.native = native
    assert _at_once(many, run, cuts) == _one_by_one(one, run)
    assert len(one.alarm_at) > 3 and len(one.by_source) == MAX_SOURCES + 1
    assert one.history_stride > 7 and one.served_labelled > 0
    assert many.counters_digest() == one.counters_digest()
    assert many.state() == one.state()  # times in the history too
    assert many.report() == one.report()


def test_record_many_names_a_bad_label_after_counting_those_before_it() -> None:
    run = _run_of(5, 40, 2)
    run["predicted"][30] = 2  # not a class index of a two-class model
    one, many = Quality(["a", "b"]), Quality(["a", "b"])
    with pytest.raises(InvalidInput) as first:
        _one_by_one(one, run)
    with pytest.raises(InvalidInput) as second:
        _at_once(many, run, [])
    assert (first.value.path, second.value.path) == ("predicted", "predicted")
    assert many.labelled == one.labelled == 30
    assert many.counters_digest() == one.counters_digest()


class _Declines:
    """The compiled loop, declining every call after the first ``takes`` (as for state of a
    type it does not take), so that the Python loop counts the rest."""

    def __init__(self, takes: int, compiled: Any) -> None:
        self.takes, self.compiled = takes, compiled

    def record_run(self, *args: Any) -> Any:
        self.takes -= 1
        return None if self.takes < 0 else self.compiled.record_run(*args)


@pytest.mark.parametrize("takes", [0, 1, 3])
def test_the_python_loop_counts_what_the_compiled_one_declines(
    takes: int, monkeypatch: pytest.MonkeyPatch
) -> None:
    if quality_runs._quality is None:
        if os.environ.get("CI"):
            pytest.fail("thresher._quality is not built; pip install the package")
        pytest.skip("thresher._quality is not built")
    run = _run_of(9, 3000, 2)
    drift = DriftParams(threshold=8.0, min_samples=20)
    one = Quality(["a", "b"], windows=(50, 700), drift=drift, history_every=7, history_max=20)
    many = Quality.from_state(one.state())
    compiled = quality_runs._quality
    monkeypatch.setattr(quality_runs, "_quality", _Declines(takes, compiled))
    assert _at_once(many, run, [1500]) == _one_by_one(one, run)
    assert many.state() == one.state()
    # State of a type the compiled loop does not take (a tuple for the decayed pair).
    plain, odd = Quality(["a", "b"]), Quality(["a", "b"])
    odd.decayed = (0.0, 0.0)  # type: ignore[assignment]
    assert compiled.record_run(odd, [0], [1], [None], ["s"], 0, "(other)", 10) is None
    monkeypatch.setattr(quality_runs, "_quality", _Declines(10**9, compiled))
    for q in (plain, odd):
        assert _at_once(q, run, []) == _one_by_one(Quality(["a", "b"]), run)
    assert odd.counters_digest() == plain.counters_digest()
