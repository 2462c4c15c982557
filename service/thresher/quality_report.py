"""The reading side of :class:`~thresher.quality.Quality`: mistake rates and the report.

PURE: reads the counters :mod:`thresher.quality` keeps (which defines them and inherits this
class) and returns plain, JSON-ready data. Precision, recall and F1 per window for two classes;
per-class scores and support for more.
"""

from __future__ import annotations

from dataclasses import asdict
from typing import Any

from .drift import DriftParams


def _rate(num: float, den: float) -> float | None:
    return num / den if den else None


def _prf(tp: int, fp: int, fn: int) -> tuple[float | None, float | None, float | None]:
    """Precision, recall and F1 = 2tp / (2tp + fp + fn); None where nothing was counted."""
    return _rate(tp, tp + fp), _rate(tp, tp + fn), _rate(2 * tp, 2 * tp + fp + fn)


class QualityReport:
    """Mistake rates and the quality report, over the counters of :class:`Quality`."""

    classes: list[str]
    k: int
    binary: bool
    windows: tuple[int, ...]
    labelled: int
    mistakes: int
    window_counts: list[list[int]]
    decayed: list[float]
    confusion: list[list[int]]
    served_labelled: int
    served_mistakes: int
    served_confusion: list[list[int]]
    by_source: dict[str, list[int]]
    ph: dict[str, Any]
    drift: DriftParams
    alarms: int
    alarm_at: list[int]
    history: list[dict[str, Any]]

    def window_mistakes(self, i: int) -> int:
        """Mistakes among the last ``windows[i]`` labels."""
        counts = self.window_counts[i]
        return counts[1] + counts[2] if self.binary else counts[1]

    def mistake_rates(self) -> dict[str, float | None]:
        """Mistake rate over all labels, each window and the decayed rate; None when empty."""
        rates: dict[str, float | None] = {"all": _rate(self.mistakes, self.labelled)}
        for i, n in enumerate(self.windows):
            rates[f"last_{n}"] = _rate(self.window_mistakes(i), min(n, self.labelled))
        rates["decayed"] = _rate(self.decayed[0], self.decayed[1])
        return rates

    def _binary_scores(self) -> dict[str, dict[str, float | None]]:
        (_, fp), (fn, tp) = self.confusion
        sets = [("all", (tp, fp, fn))]
        for n, c in zip(self.windows, self.window_counts, strict=True):
            sets.append((f"last_{n}", (c[3], c[1], c[2])))
        out: dict[str, dict[str, float | None]] = {"precision": {}, "recall": {}, "f1": {}}
        for name, (tp_, fp_, fn_) in sets:
            p, r, f = _prf(tp_, fp_, fn_)
            out["precision"][name], out["recall"][name], out["f1"][name] = p, r, f
        return out

    def _per_class(self) -> dict[str, dict[str, Any]]:
        out: dict[str, dict[str, Any]] = {}
        for j, name in enumerate(self.classes):
            tp = self.confusion[j][j]
            row = sum(self.confusion[j])
            col = sum(self.confusion[i][j] for i in range(self.k))
            p, r, f = _prf(tp, col - tp, row - tp)
            out[name] = {"precision": p, "recall": r, "f1": f, "support": row}
        return out

    def report(self) -> dict[str, Any]:
        """The JSON-ready quality report (rates are None until something was counted)."""
        report: dict[str, Any] = {
            "classes": list(self.classes),
            "windows": list(self.windows),
            "labelled": self.labelled,
            "mistakes": self.mistakes,
            "mistake_rate": self.mistake_rates(),
            "served": {
                "labelled": self.served_labelled,
                "mistakes": self.served_mistakes,
                "mistake_rate": _rate(self.served_mistakes, self.served_labelled),
                "confusion": {
                    "classes": list(self.classes),
                    "truth_by_predicted": [list(r) for r in self.served_confusion],
                },
            },
            "confusion": {
                "classes": list(self.classes),
                "truth_by_predicted": [list(r) for r in self.confusion],
            },
            "by_source": {s: c[0] for s, c in sorted(self.by_source.items())},
            "by_source_mistakes": {s: c[1] for s, c in sorted(self.by_source.items())},
            "drift": {
                "statistic": self.ph["statistic"],
                "threshold": self.drift.threshold,
                "alarms": self.alarms,
                "alarm_at": list(self.alarm_at),
                "params": asdict(self.drift),
            },
            "history": [dict(p) for p in self.history],
        }
        if self.binary:
            report["false_positives"] = self.confusion[0][1]
            report["false_negatives"] = self.confusion[1][0]
            report.update(self._binary_scores())
        else:
            report["per_class"] = self._per_class()
        return report
