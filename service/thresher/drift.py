"""Drift detection settings: the Page–Hinkley test (Page, 1954) on the mistake stream.

PURE: a validated frozen dataclass; :class:`~thresher.quality.Quality` runs the test with it on
every recorded label and re-exports it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .errors import InvalidConfig


@dataclass(frozen=True)
class DriftParams:
    """Page–Hinkley test on the 0/1 mistake stream, tuned to catch a rising mistake rate.

    With ``x_t`` the mistake indicator and ``mean_t`` the running mean of ``x_1..x_t`` since
    the last reset, the test keeps ``m_t = alpha * m_{t-1} + (x_t - mean_t - delta)``,
    ``M_t = min(0, m_1..m_t)`` and ``PH_t = m_t - M_t`` and alarms when ``PH_t > threshold``
    after at least ``min_samples`` labels. An alarm resets the test (mean, m, M and the sample
    count), so it re-learns the new mistake rate and can alarm again on a further rise.

    Parameters
    ----------
    delta : float, default 0.005
        Tolerated rise of the mistake rate per label before evidence accumulates.
    threshold : float, default 50.0
        Alarm level of ``PH_t``, in mistakes above the running mean.
    min_samples : int, default 30
        Labels needed after a reset before an alarm may fire.
    alpha : float, default 0.998
        Fading factor of ``m_t`` in (0, 1]; 1 is the classic test. Below 1 old evidence fades
        (memory ~ 1 / (1 - alpha) = 500 labels), which keeps a steady noisy stream from
        random-walking past the threshold. On generated streams: 5% -> 30% alarms after a
        median of ~240 labels; a steady 10% stream of 20,000 labels alarmed in 0 of 300 runs,
        a steady 30% one in 4 of 100.
    """

    delta: float = 0.005
    threshold: float = 50.0
    min_samples: int = 30
    alpha: float = 0.998

    def __post_init__(self) -> None:
        for name in ("delta", "threshold", "alpha"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise InvalidConfig("must be a number", path=f"drift.{name}")
            if not math.isfinite(value) or value < 0:
                raise InvalidConfig("must be a finite number >= 0", path=f"drift.{name}")
        if self.threshold <= 0:
            raise InvalidConfig("must be > 0", path="drift.threshold")
        if not 0 < self.alpha <= 1:
            raise InvalidConfig("must lie in (0, 1]", path="drift.alpha")
        if isinstance(self.min_samples, bool) or not isinstance(self.min_samples, int):
            raise InvalidConfig("must be an integer", path="drift.min_samples")
        if self.min_samples < 1:
            raise InvalidConfig("must be >= 1", path="drift.min_samples")
