"""Prometheus metrics of one service instance, in a registry of its own (one per app)."""

from __future__ import annotations

import logging
import time
from collections.abc import Callable, Iterator

from prometheus_client import CollectorRegistry, Counter, Histogram
from prometheus_client.core import GaugeMetricFamily, Metric
from prometheus_client.registry import Collector
from starlette.types import ASGIApp, Message, Receive, Scope, Send

__all__ = ["Metrics", "RequestMetricsMiddleware"]

access_log = logging.getLogger("honing.api.access")

_REFIT_BUCKETS = (0.1, 0.25, 0.5, 1.0, 2.0, 4.0, 8.0, 16.0, 32.0, 64.0, 128.0)


class _QueueDepth(Collector):
    """Reads the refit queue depth from the store at scrape time."""

    def __init__(self, depth: Callable[[], int]) -> None:
        self._depth = depth

    def collect(self) -> Iterator[Metric]:
        gauge = GaugeMetricFamily(
            "honing_refit_queue_depth", "Calibrations with a queued or running refit job"
        )
        try:
            gauge.add_metric([], float(self._depth()))
        except Exception:  # a store outage must not break the scrape of other metrics
            return
        yield gauge


class Metrics:
    """Request, run and refit metrics."""

    def __init__(self, queue_depth: Callable[[], int] | None = None) -> None:
        self.registry = CollectorRegistry()
        self.requests = Counter(
            "honing_http_requests",
            "HTTP requests by route template, method and status",
            ["method", "route", "status"],
            registry=self.registry,
        )
        self.latency = Histogram(
            "honing_http_request_duration_seconds",
            "HTTP request latency by route template",
            ["method", "route"],
            registry=self.registry,
        )
        self.runs = Counter(
            "honing_runs",
            "Run state changes seen by this instance (leased, done, failed, expired, imported)",
            ["state"],
            registry=self.registry,
        )
        self.refit_seconds = Histogram(
            "honing_refit_duration_seconds",
            "Wall time of engine refits run by this process",
            buckets=_REFIT_BUCKETS,
            registry=self.registry,
        )
        self.refits = Counter(
            "honing_refits",
            "Refit jobs by outcome (written, stale, failed, skipped)",
            ["outcome"],
            registry=self.registry,
        )
        if queue_depth is not None:
            self.registry.register(_QueueDepth(queue_depth))


class RequestMetricsMiddleware:
    """Counts and times each request by route template, and logs it as one line."""

    def __init__(self, app: ASGIApp, metrics: Metrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        status = 500
        started = time.perf_counter()

        async def send_with_status(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = int(message["status"])
            await send(message)

        try:
            await self.app(scope, receive, send_with_status)
        finally:
            elapsed = time.perf_counter() - started
            route = getattr(scope.get("route"), "path", "unmatched")
            method = scope["method"]
            self.metrics.requests.labels(method=method, route=route, status=str(status)).inc()
            self.metrics.latency.labels(method=method, route=route).observe(elapsed)
            access_log.info(
                "request",
                extra={
                    "method": method,
                    "path": scope["path"],
                    "route": route,
                    "status": status,
                    "ms": round(elapsed * 1000, 2),
                },
            )
