"""Prometheus metrics with `prometheus-client` (format, escaping and histograms are its job): request counts and a
latency histogram by route template, verdict counts, busy refusals, the model as an info gauge, score quantiles
over a sliding window and the drift assessment (its state, distance and reference). Every label set is bounded:
methods outside the HTTP standard count as "other", paths that match no route as "unmatched"."""

from __future__ import annotations

import threading
import time
from collections import deque

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
        "Fréchet distance of the recent production images to the training images (critic features).",
    ),
    "reference_mean": (
        "knowngood_drift_reference_mean",
        "Mean distance of equally many known-good holdout images to the training images: the reference.",
    ),
    "reference_std": ("knowngood_drift_reference_std", "Spread of that reference distance."),
    "limit": ("knowngood_drift_limit", "Drifting when the distance is above this limit."),
}


class _Served:
    """Collects what is true at scrape time: the model being served, the recent scores' quantiles and drift."""

    def __init__(self) -> None:
        self.lock = threading.Lock()
        self.scores: deque[float] = deque(maxlen=SCORE_WINDOW)
        self.score_sum = 0.0
        self.score_count = 0
        self.model: tuple[str, str, str, float] | None = None  # id, sha256, revision, threshold: set before a scrape
        self.drift: DriftReport | None = None  # likewise

    def collect(self):
        with self.lock:
            scores, total, count, model = list(self.scores), self.score_sum, self.score_count, self.model
            drift = self.drift
        summary = Metric(
            "knowngood_anomaly_score",
            f"Anomaly scores (higher = less like known-good); quantiles over the last {SCORE_WINDOW}.",
            "summary",
        )
        if scores:
            for q, v in zip(QUANTILES, np.quantile(np.asarray(scores), QUANTILES)):
                summary.add_sample("knowngood_anomaly_score", {"quantile": str(q)}, float(v))
        summary.add_sample("knowngood_anomaly_score_sum", {}, total)
        summary.add_sample("knowngood_anomaly_score_count", {}, count)
        yield summary
        info = GaugeMetricFamily(
            "knowngood_model_info",
            "The model being served (1 = loaded); the revision changes with each threshold change.",
            labels=["model_id", "sha256", "revision"],
        )
        if model is not None:
            info.add_metric([model[0], model[1], model[2]], 1)
        yield info
        if model is not None:
            yield GaugeMetricFamily(
                "knowngood_threshold", "Current threshold: flag when score > threshold.", value=model[3]
            )
        if drift is not None:
            yield from _drift_families(drift)


def _drift_families(report: DriftReport):
    state = GaugeMetricFamily(
        "knowngood_drift_state",
        "Drift assessment of the served model: 1 for its state now, 0 for the others.",
        labels=["state"],
    )
    for name in STATES:
        state.add_metric([name], 1.0 if report.status == name else 0.0)
    yield state
    for field, (name, help_text) in DRIFT_GAUGES.items():
        value = getattr(report, field)
        if value is not None:  # not assessed yet (too few images, no reference): no sample rather than a made-up one
            yield GaugeMetricFamily(name, help_text, value=float(value))


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
            "knowngood_inspections", "Accepted inspections by verdict.", ["verdict"], registry=self.registry
        )
        for verdict in ("pass", "flag"):
            self.verdicts.labels(verdict)
        self.busy = Counter(
            "knowngood_busy_refusals",
            "Requests answered 503 because a stage (decoding, scoring) and its queue were full.",
            ["stage"],
            registry=self.registry,
        )
        self._served = _Served()
        self.registry.register(self._served)

    def observe_request(self, method: str, route: str, status: int, seconds: float) -> None:
        method = method if method in METHODS else "other"
        self.requests.labels(method, route, str(status)).inc()
        self.latency.labels(route).observe(seconds)

    def observe_inspection(self, verdict: str, score: float) -> None:
        self.verdicts.labels(verdict).inc()
        with self._served.lock:
            self._served.scores.append(score)
            self._served.score_sum += score
            self._served.score_count += 1

    def observe_busy(self, stage: str) -> None:
        self.busy.labels(stage).inc()

    def render(
        self,
        *,
        model_id: str | None,
        model_sha256: str | None = None,
        model_revision: str | None = None,
        threshold: float | None = None,
        drift: DriftReport | None = None,
    ) -> str:
        """The text exposition; the served model and its drift assessment as they are now (None: no model)."""
        with self._served.lock:
            self._served.model = (
                None if model_id is None else (model_id, model_sha256 or "", model_revision or "", float(threshold))
            )
            self._served.drift = drift
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
