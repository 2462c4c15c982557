"""Prometheus metrics, read at the edges.

Each app builds its own `CollectorRegistry` (tests get a fresh one). Per-route request metrics
are observed by the HTTP middleware; everything about models is read from their state at scrape
time by `ModelCollector`, so the learning core never carries metric calls.
"""

from __future__ import annotations

import math
import time
from bisect import bisect_left
from collections.abc import Iterator
from typing import TYPE_CHECKING

from prometheus_client import CollectorRegistry
from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.process_collector import ProcessCollector
from prometheus_client.registry import Collector
from prometheus_client.utils import floatToGoString

if TYPE_CHECKING:
    from .lifecycle import ModelRegistry

LATENCY_BUCKETS = (
    0.0005,
    0.001,
    0.002,
    0.003,
    0.005,
    0.0075,
    0.01,
    0.025,
    0.05,
    0.1,
    0.25,
    0.5,
    1.0,
    2.5,
)
# Above this load a new token lands on an occupied slot too often (common practice: keep the
# table under about a tenth full for sparse linear models).
HASH_LOAD_WARNING = 0.1


class RouteStats:
    """One route's counts: a latency histogram and responses by status, for each method.

    Plain integers and floats, no locks: every request and every scrape runs on the event
    loop's thread, and a prometheus_client child takes a lock per sample (three per request).
    """

    __slots__ = ("by_method", "route")

    def __init__(self, route: str) -> None:
        self.route = route
        self.by_method: dict[str, MethodStats] = {}

    def observe(self, method: str, status: int, seconds: float) -> None:
        """Count one response of this route and observe how long it took."""
        stats = self.by_method.get(method)
        if stats is None:
            stats = self.by_method[method] = MethodStats()
        stats.buckets[bisect_left(LATENCY_BUCKETS, seconds)] += 1
        stats.total += seconds
        statuses = stats.statuses
        if status in statuses:
            statuses[status] += 1
        else:
            statuses[status] = 1
            stats.created[status] = time.time()


class MethodStats:
    """One route and method: bucket counts (the last is +Inf), their sum, responses by status,
    and when each series began (Prometheus's ``_created``)."""

    __slots__ = ("buckets", "created", "since", "statuses", "total")

    def __init__(self) -> None:
        self.buckets = [0] * (len(LATENCY_BUCKETS) + 1)
        self.total = 0.0
        self.statuses: dict[int, int] = {}
        self.created: dict[int, float] = {}
        self.since = time.time()


class HttpMetrics(Collector):
    """Per-route request latency and responses by status, read at scrape time."""

    def __init__(self, registry: CollectorRegistry) -> None:
        self.routes: dict[str, RouteStats] = {}
        registry.register(self)

    def route(self, template: str) -> RouteStats:
        """The counts of one route template, made on first use."""
        stats = self.routes.get(template)
        if stats is None:
            stats = self.routes[template] = RouteStats(template)
        return stats

    def observe(self, route: str, method: str, status: int, seconds: float) -> None:
        """Count one response of ``route`` and observe how long it took."""
        self.route(route).observe(method, status, seconds)

    def collect(self) -> Iterator[Metric]:
        # The same families and samples the prometheus_client Histogram and Counter wrote.
        duration = Metric(
            "thresher_http_request_duration_seconds",
            "Time from request received to response ready, by route template.",
            "histogram",
        )
        responses = CounterMetricFamily(
            "thresher_http_responses",
            "HTTP responses sent, by route template and status code.",
            labels=["route", "method", "status"],
        )
        bounds = [*map(floatToGoString, LATENCY_BUCKETS), "+Inf"]
        for route, stats in list(self.routes.items()):
            for method, method_stats in list(stats.by_method.items()):
                labels = {"route": route, "method": method}
                name = duration.name
                running = 0
                for bound, count in zip(bounds, method_stats.buckets, strict=True):
                    running += count
                    duration.add_sample(f"{name}_bucket", {**labels, "le": bound}, running)
                duration.add_sample(f"{name}_count", labels, running)
                duration.add_sample(f"{name}_sum", labels, method_stats.total)
                duration.add_sample(f"{name}_created", labels, method_stats.since)
                created = method_stats.created
                for status, count in list(method_stats.statuses.items()):
                    responses.add_metric(
                        [route, method, str(status)], count, created=created[status]
                    )
        yield duration
        yield responses


class ModelCollector(Collector):
    """Reads every model's counters and gauges when Prometheus scrapes."""

    def __init__(self, registry: ModelRegistry) -> None:
        self.models = registry

    def collect(self) -> Iterator[Metric]:
        m = self.models
        fams = _Families()
        for name in m.names():
            model = m.models.get(name)
            if model is None:
                continue
            q = model.quality
            report = q.report()
            fams.scored.add_metric([name], model.scored)
            for source, count in sorted(report["by_source"].items()):
                fams.applied.add_metric([name, source], count)
            fams.duplicates.add_metric([name], model.duplicates)
            fams.labelled.add_metric([name, "progressive"], report["labelled"])
            fams.labelled.add_metric([name, "served"], report["served"]["labelled"])
            classes = list(model.config.classes)
            for measure, matrix in (
                ("progressive", _matrix(report["confusion"])),
                ("served", _matrix(report["served"]["confusion"])),
            ):
                for t, row in enumerate(matrix):
                    for p, count in enumerate(row):
                        if t == p:
                            continue
                        fams.mistakes.add_metric(
                            [name, measure, classes[t], classes[p], _error(t, p, len(classes))],
                            count,
                        )
            rates = report["mistake_rate"]
            for key, value in rates.items():
                fams.rate.add_metric([name, key.removeprefix("last_")], _num(value))
            for fam, key in (
                (fams.precision, "precision"),
                (fams.recall, "recall"),
                (fams.f1, "f1"),
            ):
                for window, value in (report.get(key) or {}).items():
                    fam.add_metric([name, window.removeprefix("last_")], _num(value))
            drift = report["drift"]
            fams.drift_stat.add_metric([name], _num(drift["statistic"]))
            fams.drift_threshold.add_metric([name], _num(drift["threshold"]))
            fams.drift_alarms.add_metric([name], drift["alarms"])
            nonzero = int(model.nonzero())  # cached; /metrics refreshes it off the loop first
            slots = float(1 << model.config.bits)
            load = nonzero / slots
            fams.nonzero.add_metric([name], nonzero)
            fams.load.add_metric([name], load)
            # A new token collides with an occupied slot with probability ~ load.
            fams.collision.add_metric([name], load)
            fams.bits_low.add_metric([name], 1.0 if load > HASH_LOAD_WARNING else 0.0)
            fams.cache.add_metric([name], len(model.cache))
            fams.applied_ids.add_metric([name], len(model.applied))
            fams.applied_bytes.add_metric([name], model.applied.nbytes)
            fams.last_update.add_metric([name], model.last_update)
            info = m.last_snapshot.get(name)
            fams.snap_time.add_metric([name], info.time if info else 0.0)
            fams.snap_interval.add_metric([name], m.settings.snapshot_interval)
            fams.fallbacks.add_metric([name], m.snapshot_fallbacks.get(name, 0))
            head = model.log.head()
            fams.applied_offset.add_metric([name], model.offset)
            fams.head_offset.add_metric([name], head)
            fams.lag.add_metric([name], max(0, head - model.offset))
            # Only a shared log skips ahead (to a snapshot, when it was trimmed past a replica).
            fams.resyncs.add_metric([name], getattr(model.log, "resyncs", 0))
        yield from fams.all()


class _Families:
    def __init__(self) -> None:
        m = ["model"]
        self.scored = CounterMetricFamily("thresher_events_scored", "Events scored.", labels=m)
        self.applied = CounterMetricFamily(
            "thresher_labels_applied",
            "Labels applied to the weights, by source.",
            labels=[*m, "source"],
        )
        self.duplicates = CounterMetricFamily(
            "thresher_label_duplicates",
            "Labels acknowledged as duplicates, not retrained.",
            labels=m,
        )
        self.labelled = CounterMetricFamily(
            "thresher_labelled",
            "Labelled events counted for a mistake rate: progressive = scored before its "
            "update, served = the prediction the application received.",
            labels=[*m, "measure"],
        )
        self.mistakes = CounterMetricFamily(
            "thresher_mistakes",
            "Mistakes by measure, true and predicted class.",
            labels=[*m, "measure", "truth", "predicted", "error"],
        )
        self.rate = GaugeMetricFamily(
            "thresher_mistake_rate",
            "Progressive mistake rate over a window of labels.",
            labels=[*m, "window"],
        )
        self.precision = GaugeMetricFamily(
            "thresher_precision",
            "Precision of the positive class over a window.",
            labels=[*m, "window"],
        )
        self.recall = GaugeMetricFamily(
            "thresher_recall", "Recall of the positive class over a window.", labels=[*m, "window"]
        )
        self.f1 = GaugeMetricFamily(
            "thresher_f1", "F1 score of the positive class over a window.", labels=[*m, "window"]
        )
        self.drift_stat = GaugeMetricFamily(
            "thresher_drift_statistic", "Page-Hinkley statistic on the mistake stream.", labels=m
        )
        self.drift_threshold = GaugeMetricFamily(
            "thresher_drift_threshold", "Page-Hinkley alarm threshold.", labels=m
        )
        self.drift_alarms = CounterMetricFamily(
            "thresher_drift_alarms", "Drift alarms raised.", labels=m
        )
        self.nonzero = GaugeMetricFamily(
            "thresher_weights_nonzero", "Hash slots holding a nonzero weight.", labels=m
        )
        self.load = GaugeMetricFamily(
            "thresher_hash_load_ratio", "Nonzero slots divided by 2^bits.", labels=m
        )
        self.collision = GaugeMetricFamily(
            "thresher_hash_collision_probability",
            "Probability that a new token lands on an already used slot.",
            labels=m,
        )
        self.bits_low = GaugeMetricFamily(
            "thresher_hash_space_crowded",
            "1 when the hash space is crowded (over a tenth used): give the model more bits.",
            labels=m,
        )
        self.cache = GaugeMetricFamily(
            "thresher_event_cache_entries", "Scored events held for labelling by id.", labels=m
        )
        self.applied_ids = GaugeMetricFamily(
            "thresher_applied_ids",
            "Labelled ids remembered for exactly-once training (see --applied-window).",
            labels=m,
        )
        self.applied_bytes = GaugeMetricFamily(
            "thresher_applied_ids_bytes", "Memory of the applied-id index's arrays.", labels=m
        )
        self.last_update = GaugeMetricFamily(
            "thresher_last_update_timestamp_seconds", "Time of the last applied label.", labels=m
        )
        self.snap_time = GaugeMetricFamily(
            "thresher_snapshot_timestamp_seconds",
            "Time of the newest snapshot (0 = none).",
            labels=m,
        )
        self.snap_interval = GaugeMetricFamily(
            "thresher_snapshot_interval_seconds", "Configured seconds between snapshots.", labels=m
        )
        self.fallbacks = CounterMetricFamily(
            "thresher_snapshot_fallbacks",
            "Snapshot generations rejected at start-up (an older one was used).",
            labels=m,
        )
        self.applied_offset = GaugeMetricFamily(
            "thresher_log_applied_offset",
            "Next label log offset this replica will apply.",
            labels=m,
        )
        self.head_offset = GaugeMetricFamily(
            "thresher_log_head_offset", "Next offset to be written to the label log.", labels=m
        )
        self.lag = GaugeMetricFamily(
            "thresher_replica_lag_labels", "Labels in the log not yet applied here.", labels=m
        )

        self.resyncs = CounterMetricFamily(
            "thresher_replica_resyncs",
            "Snapshots loaded in place of log records this replica needed that were trimmed.",
            labels=m,
        )

    def all(self) -> Iterator[Metric]:
        yield from vars(self).values()


def _num(value: float | None) -> float:
    return math.nan if value is None else float(value)


def _matrix(confusion: object) -> list[list[int]]:
    if isinstance(confusion, dict):
        for key in ("truth_by_predicted", "matrix", "counts"):
            if key in confusion:
                return [list(map(int, row)) for row in confusion[key]]
    if isinstance(confusion, list):
        return [list(map(int, row)) for row in confusion]
    return []


def _error(truth: int, predicted: int, n_classes: int) -> str:
    if n_classes == 2:
        return "false_positive" if predicted == 1 else "false_negative"
    return "wrong_class"


def build_registry(models: ModelRegistry) -> tuple[CollectorRegistry, HttpMetrics]:
    """A fresh registry with process, HTTP and model metrics."""
    registry = CollectorRegistry(auto_describe=False)
    ProcessCollector(registry=registry)
    http = HttpMetrics(registry)
    registry.register(ModelCollector(models))
    return registry, http
