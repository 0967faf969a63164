"""Prometheus metrics at ``/metrics``: request counts and latencies, verdicts, cache size.

Each app has its own registry (several apps live in one test process). With several worker
processes each worker counts its own requests; scrape each worker, or sum across them.
Labels carry route templates and verdicts only — never collection names, keys or values.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

from fastapi import APIRouter, Request, Response
from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Histogram,
    generate_latest,
)
from prometheus_client.core import GaugeMetricFamily
from prometheus_client.registry import Collector

__all__ = ["Metrics", "router"]

router = APIRouter(tags=["health"])


class _CacheCollector(Collector):
    """Reads the compiled-memory cache at scrape time instead of tracking every change."""

    def __init__(self, app: Any) -> None:
        self.app = app

    def collect(self) -> Iterator[GaugeMetricFamily]:
        service = getattr(self.app.state, "service", None)
        if service is None:
            return
        yield GaugeMetricFamily(
            "cuebank_compiled_cache_bytes",
            "Bytes held by compiled collections in this worker's cache.",
            value=service.cache.total_bytes,
        )
        yield GaugeMetricFamily(
            "cuebank_compiled_cache_collections",
            "Compiled collections in this worker's cache.",
            value=len(service.cache),
        )


class Metrics:
    """The app's registry and the metrics the middleware and routers update."""

    def __init__(self, app: Any) -> None:
        self.registry = CollectorRegistry()
        self.requests = Counter(
            "cuebank_requests",
            "HTTP requests answered, by method, route template and status.",
            ["method", "route", "status"],
            registry=self.registry,
        )
        self.latency = Histogram(
            "cuebank_request_duration_seconds",
            "Time to answer an HTTP request, by method and route template.",
            ["method", "route"],
            buckets=(0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 10.0),
            registry=self.registry,
        )
        self.verdicts = Counter(
            "cuebank_recall_verdicts",
            "Recall answers by verdict and reason.",
            ["verdict", "reason"],
            registry=self.registry,
        )
        self.registry.register(_CacheCollector(app))
        # Labelled children looked up once: labels() validates and locks on every call, a
        # cost on the busiest paths. Route templates, statuses and verdicts are few.
        self._children: dict[tuple[Any, ...], Any] = {}

    def _child(self, metric: Any, *labels: str) -> Any:
        key = (id(metric), *labels)
        child = self._children.get(key)
        if child is None:
            child = self._children[key] = metric.labels(*labels)
        return child

    def observe(self, method: str, route: str, status: int, seconds: float) -> None:
        self._child(self.requests, method, route, str(status)).inc()
        self._child(self.latency, method, route).observe(seconds)

    def count_verdict(self, verdict: str, reason: str, n: int) -> None:
        self._child(self.verdicts, verdict, reason).inc(n)


@router.get("/metrics", include_in_schema=False)
def metrics(request: Request) -> Response:
    """Prometheus metrics of this worker."""
    registry = request.app.state.metrics.registry
    return Response(generate_latest(registry), media_type=CONTENT_TYPE_LATEST)
