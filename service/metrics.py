"""Prometheus text exposition (format 0.0.4), hand-written: request counts, a latency histogram, verdict counts,
the model as an info gauge and score quantiles over a sliding window."""

from __future__ import annotations

import threading
import time
from collections import Counter, deque

import numpy as np
from starlette.types import ASGIApp, Message, Receive, Scope, Send

CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"
BUCKETS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)  # seconds
QUANTILES = (0.5, 0.9, 0.99)
SCORE_WINDOW = 1000  # recent scores the quantiles are taken over


def _escape(value: str) -> str:
    return value.replace("\\", "\\\\").replace("\n", "\\n").replace('"', '\\"')


def _labels(**labels: str) -> str:
    return "{" + ",".join(f'{k}="{_escape(str(v))}"' for k, v in labels.items()) + "}" if labels else ""


def _num(x: float) -> str:
    return repr(float(x)) if np.isfinite(x) else ("+Inf" if x > 0 else "-Inf" if x < 0 else "NaN")


class Metrics:
    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.requests: Counter[tuple[str, str, int]] = Counter()
        self.latency: dict[str, list[int]] = {}  # route -> bucket counts (last = +Inf)
        self.latency_sum: Counter[str] = Counter()
        self.verdicts: Counter[str] = Counter({"pass": 0, "flag": 0})
        self.scores: deque[float] = deque(maxlen=SCORE_WINDOW)
        self.score_sum = 0.0
        self.score_count = 0

    def observe_request(self, method: str, route: str, status: int, seconds: float) -> None:
        index = next((i for i, b in enumerate(BUCKETS) if seconds <= b), len(BUCKETS))
        with self._lock:
            self.requests[(method, route, status)] += 1
            self.latency.setdefault(route, [0] * (len(BUCKETS) + 1))[index] += 1
            self.latency_sum[route] += seconds

    def observe_inspection(self, verdict: str, score: float) -> None:
        with self._lock:
            self.verdicts[verdict] += 1
            self.scores.append(score)
            self.score_sum += score
            self.score_count += 1

    def render(self, *, model_id: str | None, model_sha256: str | None, threshold: float | None) -> str:
        with self._lock:
            lines = self._requests_text() + self._latency_text() + self._inspections_text()
        lines += [
            "# HELP knowngood_model_info The model being served (1 = loaded).",
            "# TYPE knowngood_model_info gauge",
        ]
        if model_id is not None:
            lines.append(f"knowngood_model_info{_labels(model_id=model_id, sha256=model_sha256 or '')} 1")
            lines += [
                "# HELP knowngood_threshold Current threshold: flag when score > threshold.",
                "# TYPE knowngood_threshold gauge",
                f"knowngood_threshold {_num(threshold)}",
            ]
        return "\n".join(lines) + "\n"

    def _requests_text(self) -> list[str]:
        out = [
            "# HELP knowngood_http_requests_total HTTP requests by method, route and status.",
            "# TYPE knowngood_http_requests_total counter",
        ]
        for (method, route, status), n in sorted(self.requests.items()):
            out.append(f"knowngood_http_requests_total{_labels(method=method, route=route, status=str(status))} {n}")
        return out

    def _latency_text(self) -> list[str]:
        out = [
            "# HELP knowngood_http_request_duration_seconds Time from request to the end of the response.",
            "# TYPE knowngood_http_request_duration_seconds histogram",
        ]
        for route, counts in sorted(self.latency.items()):
            running = 0
            for bound, n in zip((*BUCKETS, float("inf")), counts):
                running += n
                le = "+Inf" if bound == float("inf") else repr(bound)
                out.append(f"knowngood_http_request_duration_seconds_bucket{_labels(route=route, le=le)} {running}")
            out.append(
                f"knowngood_http_request_duration_seconds_sum{_labels(route=route)} {_num(self.latency_sum[route])}"
            )
            out.append(f"knowngood_http_request_duration_seconds_count{_labels(route=route)} {running}")
        return out

    def _inspections_text(self) -> list[str]:
        out = [
            "# HELP knowngood_inspections_total Accepted inspections by verdict.",
            "# TYPE knowngood_inspections_total counter",
        ]
        out += [f"knowngood_inspections_total{_labels(verdict=v)} {n}" for v, n in sorted(self.verdicts.items())]
        out += [
            f"# HELP knowngood_anomaly_score Anomaly scores (higher = less like known-good); quantiles over the "
            f"last {SCORE_WINDOW}.",
            "# TYPE knowngood_anomaly_score summary",
        ]
        if self.scores:
            qs = np.quantile(np.fromiter(self.scores, float), QUANTILES)
            out += [f"knowngood_anomaly_score{_labels(quantile=str(q))} {_num(v)}" for q, v in zip(QUANTILES, qs)]
        out += [
            f"knowngood_anomaly_score_sum {_num(self.score_sum)}",
            f"knowngood_anomaly_score_count {self.score_count}",
        ]
        return out


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
