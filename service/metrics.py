"""Prometheus metrics with `prometheus-client` (format, escaping and histograms are its job): request counts and a
latency histogram by route template, verdict counts, busy refusals, the model as an info gauge, score quantiles
over a sliding window and the drift assessment (its state, distance and reference). Every label set is bounded:
methods outside the HTTP standard count as "other", paths that match no route as "unmatched"."""

from __future__ import annotations

import threading
import time
from collections import deque
from dataclasses import dataclass

import numpy as np
from knowngood.service.drift import STATES, DriftReport
from prometheus_client import CollectorRegistry, Counter, Histogram, disable_created_metrics, generate_latest
from prometheus_client.exposition import CONTENT_TYPE_PLAIN_0_0_4
from prometheus_client.metrics_core import GaugeMetricFamily, Metric
from starlette.types import ASGIApp, Message, Receive, Scope, Send

CONTENT_TYPE = CONTENT_TYPE_PLAIN_0_0_4
BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)  # seconds
QUANTILES = (0.5, 0.9, 0.99)
SCORE_WINDOW = 1000  # recent scores the quantiles are taken over
disable_created_metrics()  # no *_created series: half the series, and nothing a dashboard here reads
METHODS = frozenset({"GET", "HEAD", "POST", "PUT", "PATCH", "DELETE", "OPTIONS"})


DRIFT_GAUGES = {  # DriftReport field -> (metric name, help)
    "images": ("knowngood_drift_images", "Production images in the served model's drift window."),
    "distance": (
        "knowngood_drift_distance",
        "Fréchet distance of the recent production images to the training images (whitened critic features).",
    ),
    "reference_mean": (
        "knowngood_drift_reference_mean",
        "Mean distance of equally many known-good holdout images to the training images: the reference.",
    ),
    "reference_std": ("knowngood_drift_reference_std", "Spread of that reference distance."),
    "limit": ("knowngood_drift_limit", "Drifting when the distance is above this limit."),
}


@dataclass(frozen=True)
class Served:
    """What one part type serves at scrape time."""

    part_type: str
    model_id: str
    sha256: str
    revision: str
    threshold: float
    drift: DriftReport | None


class _Scraped:
    """Collects what is true at scrape time, per part type: its model, recent scores' quantiles and drift."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.scores: dict[str, deque[float]] = {}
        self.score_sum: dict[str, float] = {}
        self.score_count: dict[str, int] = {}
        self.served: list[Served] = []  # set before a scrape

    def collect(self):
        with self.lock:
            scores = {k: list(v) for k, v in self.scores.items()}
            totals, counts, served = dict(self.score_sum), dict(self.score_count), list(self.served)
        summary = Metric(
            "knowngood_anomaly_score",
            f"Anomaly scores by part type (higher = less like known-good); quantiles over the last {SCORE_WINDOW}.",
            "summary",
        )
        for part_type in sorted(scores):
            for q, v in zip(QUANTILES, np.quantile(np.asarray(scores[part_type]), QUANTILES)):
                summary.add_sample("knowngood_anomaly_score", {"part_type": part_type, "quantile": str(q)}, float(v))
            summary.add_sample("knowngood_anomaly_score_sum", {"part_type": part_type}, totals[part_type])
            summary.add_sample("knowngood_anomaly_score_count", {"part_type": part_type}, counts[part_type])
        yield summary
        info = GaugeMetricFamily(
            "knowngood_model_info",
            "The model each part type serves (1 = loaded); the revision changes with each threshold change.",
            labels=["part_type", "model_id", "sha256", "revision"],
        )
        threshold = GaugeMetricFamily(
            "knowngood_threshold", "Current threshold by part type: flag when score > threshold.", labels=["part_type"]
        )
        for s in served:
            info.add_metric([s.part_type, s.model_id, s.sha256, s.revision], 1)
            threshold.add_metric([s.part_type], s.threshold)
        yield info
        yield threshold
        yield from _drift_families([s for s in served if s.drift is not None])


def _drift_families(served: list[Served]):
    state = GaugeMetricFamily(
        "knowngood_drift_state",
        "Drift assessment of each part type's model: 1 for its state now, 0 for the others.",
        labels=["part_type", "state"],
    )
    gauges = {
        field: GaugeMetricFamily(name, help_text, labels=["part_type"])
        for field, (name, help_text) in DRIFT_GAUGES.items()
    }
    for s in served:
        for name in STATES:
            state.add_metric([s.part_type, name], 1.0 if s.drift.status == name else 0.0)
        for field, gauge in gauges.items():
            value = getattr(s.drift, field)
            if value is not None:  # not assessed yet (too few images, no reference): no sample, not a made-up one
                gauge.add_metric([s.part_type], float(value))
    yield state
    yield from gauges.values()


class Metrics:
    """One registry per app (tests run many apps in one process)."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        self.requests = Counter(
            "knowngood_http_requests",
            "HTTP requests by method, route and status.",
            ["method", "route", "status"],
            registry=self.registry,
        )
        self.latency = Histogram(
            "knowngood_http_request_duration_seconds",
            "Time from request to the end of the response.",
            ["route"],
            buckets=BUCKETS,
            registry=self.registry,
        )
        self.verdicts = Counter(
            "knowngood_inspections",
            "Accepted inspections by part type and verdict.",
            ["part_type", "verdict"],
            registry=self.registry,
        )
        self.busy = Counter(
            "knowngood_busy_refusals",
            "Requests answered 503 because a stage (decoding, scoring) and its queue were full.",
            ["stage"],
            registry=self.registry,
        )
        self._scraped = _Scraped()
        self.registry.register(self._scraped)

    def observe_request(self, method: str, route: str, status: int, seconds: float) -> None:
        method = method if method in METHODS else "other"
        self.requests.labels(method, route, str(status)).inc()
        self.latency.labels(route).observe(seconds)

    def observe_inspection(self, part_type: str, verdict: str, score: float) -> None:
        self.verdicts.labels(part_type, verdict).inc()
        with self._scraped.lock:
            if part_type not in self._scraped.scores:
                self._scraped.scores[part_type] = deque(maxlen=SCORE_WINDOW)
                self._scraped.score_sum[part_type], self._scraped.score_count[part_type] = 0.0, 0
            self._scraped.scores[part_type].append(score)
            self._scraped.score_sum[part_type] += score
            self._scraped.score_count[part_type] += 1

    def observe_busy(self, stage: str) -> None:
        self.busy.labels(stage).inc()

    def render(self, served: list[Served]) -> str:
        """The text exposition; what each part type serves and its drift assessment as they are now."""
        with self._scraped.lock:
            self._scraped.served = list(served)
        return generate_latest(self.registry).decode()


class MetricsMiddleware:
    """Counts every HTTP request by its route template (not the raw path, which would explode the label set)."""

    def __init__(self, app: ASGIApp, metrics: Metrics):
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        start = time.perf_counter()
        status = 500

        async def send_wrapper(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, send_wrapper)
        finally:
            route = getattr(scope.get("route"), "path", None) or "unmatched"
            self.metrics.observe_request(scope["method"], route, status, time.perf_counter() - start)
