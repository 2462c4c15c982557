"""Progressive-validation counters: mistake rates, confusion, rolling windows and drift.

Pure: labels in, counters out; no I/O, no clocks (a record's time is passed in), no globals.
Every label is scored by the model before it learns from it, so the running mistake rate is an
honest estimate of the error on unseen data (progressive validation; Blum, Kalai & Langford,
1999). Rolling windows keep the last ``n`` outcomes in one byte ring, each window updated in
O(1) per record. Drift is a Page–Hinkley test (Page, 1954) for an increase of the mistake rate,
with the settings of :mod:`thresher.drift`. This module records and stores the counters;
:mod:`thresher.quality_report` reads them (mistake rates, the report).
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Sequence
from dataclasses import asdict
from numbers import Integral
from typing import Any

from .drift import DriftParams as DriftParams
from .errors import InvalidConfig, InvalidInput
from .quality_report import QualityReport
from .quality_runs import MAX_ALARMS_KEPT as MAX_ALARMS_KEPT
from .quality_runs import MAX_SOURCES as MAX_SOURCES
from .quality_runs import OTHER_SOURCE as OTHER_SOURCE
from .quality_runs import RunCounting

STATE_FORMAT = 1


def _all_indices(values: Sequence[Any], n: int) -> bool:
    """Every value a plain int in [0, n): what `_index` takes without a second look."""
    return not values or (set(map(type, values)) == {int} and min(values) >= 0 and max(values) < n)


def _index(value: Any, n: int, path: str) -> int:
    if type(value) is int and 0 <= value < n:  # the common case, without the ABC check
        return value
    if isinstance(value, bool) or not isinstance(value, Integral) or not 0 <= value < n:
        raise InvalidInput(f"must be a class index in [0, {n})", path=path)
    return int(value)


class Quality(RunCounting, QualityReport):
    """Counters of one model's progressive and served predictions.

    Parameters
    ----------
    classes : list of str
        Class names, at least two; with two, class 1 is the positive class.
    windows : tuple of int, default (1000, 10000)
        Rolling window lengths in labels; reported as ``last_<n>``.
    half_life : float, default 1000.0
        Half-life, in labels, of the exponentially decayed mistake rate.
    drift : DriftParams, optional
        Page–Hinkley settings; ``DriftParams()`` when omitted.
    history_every : int, default 50
        Labels between history points at first; doubles each time the history is decimated.
    history_max : int, default 600
        Most history points kept; when exceeded every other point is dropped.
    """

    def __init__(
        self,
        classes: list[str],
        windows: tuple[int, ...] = (1000, 10000),
        half_life: float = 1000.0,
        drift: DriftParams | None = None,
        history_every: int = 50,
        history_max: int = 600,
    ) -> None:
        if not isinstance(classes, list | tuple) or len(classes) < 2:
            raise InvalidConfig("must list at least two class names", path="classes")
        if not all(isinstance(c, str) for c in classes) or len(set(classes)) != len(classes):
            raise InvalidConfig("must be distinct strings", path="classes")
        ok = isinstance(windows, list | tuple) and len(windows) > 0
        if not ok or any(isinstance(n, bool) or not isinstance(n, int) or n < 1 for n in windows):
            raise InvalidConfig("must be a non-empty list of positive integers", path="windows")
        if isinstance(half_life, bool) or not isinstance(half_life, int | float):
            raise InvalidConfig("must be a number", path="half_life")
        if not math.isfinite(half_life) or half_life <= 0:
            raise InvalidConfig("must be a finite number > 0", path="half_life")
        for name, value, lo in (
            ("history_every", history_every, 1),
            ("history_max", history_max, 2),
        ):
            if isinstance(value, bool) or not isinstance(value, int) or value < lo:
                raise InvalidConfig(f"must be an integer >= {lo}", path=name)
        self.classes = [str(c) for c in classes]
        self.k = len(self.classes)
        self.binary = self.k == 2
        self.windows = tuple(sorted(set(int(n) for n in windows)))
        self.half_life = float(half_life)
        self.drift = drift if drift is not None else DriftParams()
        if not isinstance(self.drift, DriftParams):
            raise InvalidConfig("must be a DriftParams", path="drift")
        self.history_every = history_every
        self.history_max = history_max
        self._decay = 2.0 ** (-1.0 / self.half_life)
        # Binary outcomes are coded 2*truth + predicted (0 TN, 1 FP, 2 FN, 3 TP); multi-class
        # outcomes as 1 for a mistake, 0 otherwise.
        self._codes = 4 if self.binary else 2
        self.labelled = 0
        self.mistakes = 0
        self.ring = bytearray(self.windows[-1])
        self.window_counts = [[0] * self._codes for _ in self.windows]
        self.decayed = [0.0, 0.0]  # decayed mistakes, decayed label count
        self.confusion = [[0] * self.k for _ in range(self.k)]
        self.served_labelled = 0
        self.served_mistakes = 0
        self.served_confusion = [[0] * self.k for _ in range(self.k)]
        self.by_source: dict[str, list[int]] = {}  # source -> [labelled, mistakes]
        self.ph = {"n": 0, "mean": 0.0, "m": 0.0, "m_min": 0.0, "statistic": 0.0}
        self.alarms = 0
        self.alarm_at: list[int] = []
        self.history: list[dict[str, Any]] = []
        self.history_stride = history_every
        self.native = True  # False: `record_many` counts in its Python loop (the reference)

    # -- recording -------------------------------------------------------------------------

    def record(
        self,
        truth: int,
        predicted: int,
        *,
        source: str,
        served: int | None = None,
        time: float | None = None,
    ) -> bool:
        """Count one label; True when this record raised a drift alarm."""
        truth = _index(truth, self.k, "truth")
        predicted = _index(predicted, self.k, "predicted")
        if served is not None:
            served = _index(served, self.k, "served")
        if not isinstance(source, str):
            raise InvalidInput("must be a string", path="source")
        mistake = truth != predicted
        t = self.labelled
        self.labelled += 1
        self.mistakes += mistake
        self.confusion[truth][predicted] += 1
        code = 2 * truth + predicted if self.binary else int(mistake)
        size = len(self.ring)
        for n, counts in zip(self.windows, self.window_counts, strict=True):
            if t >= n:  # the outcome leaving this window; read before the ring slot is reused
                counts[self.ring[(t - n) % size]] -= 1
            counts[code] += 1
        self.ring[t % size] = code
        d = self._decay
        self.decayed = [d * self.decayed[0] + mistake, d * self.decayed[1] + 1.0]
        if served is not None:
            self.served_labelled += 1
            self.served_mistakes += truth != served
            self.served_confusion[truth][served] += 1
        if source not in self.by_source and len(self.by_source) >= MAX_SOURCES:
            source = OTHER_SOURCE
        counts = self.by_source.setdefault(source, [0, 0])
        counts[0] += 1
        counts[1] += mistake
        alarm = self._page_hinkley(1.0 if mistake else 0.0)
        if self.labelled % self.history_stride == 0:
            self._sample(time)
        return alarm

    def record_many(
        self,
        truths: Sequence[int],
        predicted: Sequence[int],
        *,
        sources: Sequence[str],
        served: Sequence[int | None],
        times: Sequence[float | None],
    ) -> int | None:
        """Count labels in order as :meth:`record` would each, stopping after the first one that
        raises a drift alarm: its position, or None when every label was counted quietly.

        Labels that are all plain class indices are counted in one loop (see
        :mod:`thresher.quality_runs`), so the counters end bit-identical to :meth:`record`'s;
        any other label goes through :meth:`record`, which names the fault.
        """
        n = len(truths)
        k = self.k
        if not (
            len(predicted) == len(sources) == len(served) == len(times) == n
            and _all_indices(truths, k)
            and _all_indices(predicted, k)
            and _all_indices([s for s in served if s is not None], k)
            and set(map(type, sources)) <= {str}
        ):
            for i in range(n):  # the exact error, after the labels before it are counted
                kw = {"source": sources[i], "served": served[i], "time": times[i]}
                if self.record(truths[i], predicted[i], **kw):
                    return i
            return None
        return self._count_checked(truths, predicted, sources, served, times)

    def _page_hinkley(self, x: float) -> bool:
        ph, p = self.ph, self.drift
        ph["n"] += 1
        ph["mean"] += (x - ph["mean"]) / ph["n"]
        ph["m"] = p.alpha * ph["m"] + (x - ph["mean"] - p.delta)
        ph["m_min"] = min(ph["m_min"], ph["m"])
        ph["statistic"] = ph["m"] - ph["m_min"]
        if ph["n"] < p.min_samples or ph["statistic"] <= p.threshold:
            return False
        self.alarms += 1
        self.alarm_at = [*self.alarm_at, self.labelled][-MAX_ALARMS_KEPT:]
        self.ph = {"n": 0, "mean": 0.0, "m": 0.0, "m_min": 0.0, "statistic": 0.0}
        return True

    def _sample(self, time: float | None) -> None:
        self.history.append(
            {"labelled": self.labelled, "time": time, **self.mistake_rates(), "alarms": self.alarms}
        )
        if len(self.history) > self.history_max:
            self.history_stride *= 2
            self.history = [p for p in self.history if p["labelled"] % self.history_stride == 0]

    # -- state -----------------------------------------------------------------------------

    def state(self) -> dict[str, Any]:
        """Plain data (lists, ints, floats, str, bytes) that :meth:`from_state` rebuilds."""
        return {
            "format": STATE_FORMAT,
            "classes": list(self.classes),
            "windows": list(self.windows),
            "half_life": self.half_life,
            "drift_params": asdict(self.drift),
            "history_every": self.history_every,
            "history_max": self.history_max,
            "labelled": self.labelled,
            "mistakes": self.mistakes,
            "ring": bytes(self.ring),
            "window_counts": [list(c) for c in self.window_counts],
            "decayed": list(self.decayed),
            "confusion": [list(r) for r in self.confusion],
            "served_labelled": self.served_labelled,
            "served_mistakes": self.served_mistakes,
            "served_confusion": [list(r) for r in self.served_confusion],
            "by_source": {s: list(c) for s, c in self.by_source.items()},
            "ph": dict(self.ph),
            "alarms": self.alarms,
            "alarm_at": list(self.alarm_at),
            "history": [dict(p) for p in self.history],
            "history_stride": self.history_stride,
        }

    @classmethod
    def from_state(cls, state: dict[str, Any]) -> Quality:
        """Rebuild from :meth:`state`; raises InvalidConfig naming the first bad field."""
        if not isinstance(state, dict) or state.get("format") != STATE_FORMAT:
            raise InvalidConfig(f"quality state format must be {STATE_FORMAT}", path="format")
        try:
            params = state["drift_params"]
            if not isinstance(params, dict):
                raise InvalidConfig("must be an object", path="drift_params")
            q = cls(
                list(state["classes"]),
                tuple(state["windows"]),
                state["half_life"],
                DriftParams(**params),
                state["history_every"],
                state["history_max"],
            )
            q._load(state)
        except KeyError as missing:
            raise InvalidConfig("missing from quality state", path=str(missing.args[0])) from None
        except (TypeError, ValueError) as bad:
            raise InvalidConfig(f"quality state does not fit its config: {bad}") from None
        return q

    def _load(self, s: dict[str, Any]) -> None:
        def ints(value: Any, path: str, shape: tuple[int, ...]) -> Any:
            if len(shape) == 0:
                if isinstance(value, bool) or not isinstance(value, int) or value < 0:
                    raise InvalidConfig("must be an integer >= 0", path=path)
                return int(value)
            if not isinstance(value, list | tuple) or len(value) != shape[0]:
                raise InvalidConfig(f"must be a list of {shape[0]}", path=path)
            return [ints(v, f"{path}[{i}]", shape[1:]) for i, v in enumerate(value)]

        k = self.k
        self.labelled = ints(s["labelled"], "labelled", ())
        self.mistakes = ints(s["mistakes"], "mistakes", ())
        ring = s["ring"]
        if not isinstance(ring, bytes | bytearray) or len(ring) != len(self.ring):
            raise InvalidConfig(f"must be {len(self.ring)} bytes", path="ring")
        if any(b >= self._codes for b in ring):
            raise InvalidConfig("holds an unknown outcome code", path="ring")
        self.ring = bytearray(ring)
        self.window_counts = ints(
            s["window_counts"], "window_counts", (len(self.windows), self._codes)
        )
        self.decayed = [float(v) for v in s["decayed"]][:2]
        self.confusion = ints(s["confusion"], "confusion", (k, k))
        self.served_labelled = ints(s["served_labelled"], "served_labelled", ())
        self.served_mistakes = ints(s["served_mistakes"], "served_mistakes", ())
        self.served_confusion = ints(s["served_confusion"], "served_confusion", (k, k))
        self.by_source = {
            str(src): ints(c, f"by_source.{src}", (2,)) for src, c in s["by_source"].items()
        }
        self.ph = {key: type(default)(s["ph"][key]) for key, default in self.ph.items()}
        self.alarms = ints(s["alarms"], "alarms", ())
        self.alarm_at = [int(v) for v in s["alarm_at"]][-MAX_ALARMS_KEPT:]
        self.history = [dict(p) for p in s["history"]]
        self.history_stride = ints(s["history_stride"], "history_stride", ())
        if sum(map(sum, self.confusion)) != self.labelled or self.history_stride < 1:
            raise InvalidConfig("counters disagree with the label count", path="confusion")

    def counters_digest(self) -> str:
        """Hex SHA-256 of every deterministic counter (history times left out)."""
        state = self.state()
        state["ring"] = state["ring"].hex()
        state["history"] = [{k: v for k, v in p.items() if k != "time"} for p in self.history]
        text = json.dumps(state, sort_keys=True, separators=(",", ":"), allow_nan=False)
        return hashlib.sha256(text.encode()).hexdigest()
