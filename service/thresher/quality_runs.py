"""Counting a run of checked labels at once: the loops behind ``Quality.record_many``.

:class:`RunCounting` is the part of :class:`~thresher.quality.Quality` that counts labels
already checked to be plain class indices, as ``Quality.record`` would one by one. The
compiled loop (``_quality.c``) stops after every drift alarm and history sample for Python
to book the alarm and take the sample; the Python loop here is its reference, and counts
whatever the compiled loop declines. PURE, as :mod:`thresher.quality`.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from typing import Any

from .drift import DriftParams

try:  # the compiled fast path (_quality.c); the Python loop below is its reference
    from . import _quality
except ImportError:  # pragma: no cover - a build without the C extension
    _quality = None  # type: ignore[assignment]

MAX_ALARMS_KEPT = 100
MAX_SOURCES = 1000
OTHER_SOURCE = "(other)"  # where labels of sources past MAX_SOURCES are counted


class RunCounting:
    """Run counting of :class:`~thresher.quality.Quality`, which defines these counters."""

    binary: bool
    windows: tuple[int, ...]
    labelled: int
    mistakes: int
    ring: bytearray
    window_counts: list[list[int]]
    _decay: float
    decayed: list[float]
    confusion: list[list[int]]
    served_labelled: int
    served_mistakes: int
    served_confusion: list[list[int]]
    by_source: dict[str, list[int]]
    drift: DriftParams
    ph: dict[str, Any]
    alarms: int
    alarm_at: list[int]
    history_stride: int
    native: bool
    _sample: Callable[[float | None], None]

    def _count_checked(
        self,
        truths: Sequence[int],
        predicted: Sequence[int],
        sources: Sequence[str],
        served: Sequence[int | None],
        times: Sequence[float | None],
    ) -> int | None:
        """`Quality.record_many` of checked labels: the position of the label that raised a
        drift alarm (the last one counted), or None when every label was counted quietly."""
        n = len(truths)
        start, fired = 0, None
        if _quality is not None and self.native:
            start, fired = self._record_compiled(truths, predicted, sources, served, times)
        if fired is not None or start == n:
            return fired
        if start:
            fired = self._record_loop(
                truths[start:], predicted[start:], sources[start:], served[start:], times[start:]
            )
            return None if fired is None else start + fired
        return self._record_loop(truths, predicted, sources, served, times)

    def _record_compiled(
        self,
        truths: Sequence[int],
        predicted: Sequence[int],
        sources: Sequence[str],
        served: Sequence[int | None],
        times: Sequence[float | None],
    ) -> tuple[int, int | None]:
        """`record_many` of checked labels through the compiled loop, which stops after every
        alarm and history sample for Python to take them: (labels counted, alarm position)."""
        n = len(truths)
        lists = [x if type(x) is list else list(x) for x in (truths, predicted, served, sources)]
        start = 0
        while start < n:
            made = _quality.record_run(self, *lists, start, OTHER_SOURCE, MAX_SOURCES)
            if made is None:  # state or labels it does not take: the Python loop goes on
                return start, None
            stop, alarm = made
            if stop == n:
                break
            if alarm:  # as the Python loop: count the alarm, then take a due sample
                self.alarms += 1
                self.alarm_at = [*self.alarm_at, self.labelled][-MAX_ALARMS_KEPT:]
                self.ph = {"n": 0, "mean": 0.0, "m": 0.0, "m_min": 0.0, "statistic": 0.0}
            if self.labelled % self.history_stride == 0:
                self._sample(times[stop])
            if alarm:
                return stop + 1, stop
            start = stop + 1
        return n, None

    def _record_loop(
        self,
        truths: Sequence[int],
        predicted: Sequence[int],
        sources: Sequence[str],
        served: Sequence[int | None],
        times: Sequence[float | None],
    ) -> int | None:
        """The counting loop of `record_many` over checked labels, in Python."""
        n = len(truths)
        binary, confusion, served_confusion = self.binary, self.confusion, self.served_confusion
        ring, by_source = self.ring, self.by_source
        size = len(ring)
        windows = list(zip(self.windows, self.window_counts, strict=True))
        decay, (dm, dn) = self._decay, self.decayed
        labelled, mistakes = self.labelled, self.mistakes
        served_labelled, served_mistakes = self.served_labelled, self.served_mistakes
        p = self.drift
        alpha, delta, min_samples, threshold = p.alpha, p.delta, p.min_samples, p.threshold
        ph = self.ph
        ph_n, mean, m, m_min, statistic = ph["n"], ph["mean"], ph["m"], ph["m_min"], ph["statistic"]
        stride = self.history_stride
        fired = None
        for i in range(n):
            truth, guess = truths[i], predicted[i]
            mistake = truth != guess
            t = labelled
            labelled += 1
            mistakes += mistake
            confusion[truth][guess] += 1
            code = 2 * truth + guess if binary else int(mistake)
            for width, counts in windows:
                if t >= width:
                    counts[ring[(t - width) % size]] -= 1
                counts[code] += 1
            ring[t % size] = code
            dm, dn = decay * dm + mistake, decay * dn + 1.0
            shown = served[i]
            if shown is not None:
                served_labelled += 1
                served_mistakes += truth != shown
                served_confusion[truth][shown] += 1
            counts = by_source.get(sources[i])
            if counts is None:
                source = sources[i] if len(by_source) < MAX_SOURCES else OTHER_SOURCE
                counts = by_source.setdefault(source, [0, 0])
            counts[0] += 1
            counts[1] += mistake
            # Page–Hinkley, as `_page_hinkley` computes it.
            x = 1.0 if mistake else 0.0
            ph_n += 1
            mean += (x - mean) / ph_n
            m = alpha * m + (x - mean - delta)
            if m < m_min:
                m_min = m
            statistic = m - m_min
            alarm = not (ph_n < min_samples or statistic <= threshold)
            if alarm or labelled % stride == 0:
                self.labelled, self.mistakes, self.decayed = labelled, mistakes, [dm, dn]
                if alarm:
                    self.alarms += 1
                    self.alarm_at = [*self.alarm_at, labelled][-MAX_ALARMS_KEPT:]
                    ph_n, mean, m, m_min, statistic = 0, 0.0, 0.0, 0.0, 0.0
                    fired = i
                if labelled % stride == 0:
                    self._sample(times[i])
                    stride = self.history_stride
                if alarm:
                    break
        self.labelled, self.mistakes, self.decayed = labelled, mistakes, [dm, dn]
        self.served_labelled, self.served_mistakes = served_labelled, served_mistakes
        self.ph = {"n": ph_n, "mean": mean, "m": m, "m_min": m_min, "statistic": statistic}
        return fired
