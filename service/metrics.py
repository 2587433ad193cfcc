"""Prometheus metrics through the Prometheus client library, correct across uvicorn workers.

With several workers each one is its own process; when ``PROMETHEUS_MULTIPROC_DIR`` is
set (``equitheta serve`` sets it to a fresh directory whenever it starts more than one
worker) every worker writes its counts there and a scrape, whichever worker answers it,
sums all of them. With one process the metrics live in the app's own registry.
"""

from __future__ import annotations

import os

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, generate_latest
from prometheus_client import multiprocess as prometheus_multiprocess

BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0)
CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"


def multiprocess_mode() -> bool:
    """Whether counters are shared between worker processes (PROMETHEUS_MULTIPROC_DIR is set)."""
    return bool(os.environ.get("PROMETHEUS_MULTIPROC_DIR"))


class Metrics:
    """The service's counters, histogram and gauges."""

    def __init__(self) -> None:
        shared = multiprocess_mode()
        # In multiprocess mode the values go to files; the objects need no registry of their own.
        registry = None if shared else CollectorRegistry()
        self._registry = registry
        self.requests = Counter(
            "equitheta_requests",
            "HTTP requests by route, method and status.",
            ["route", "method", "status"],
            registry=registry,
        )
        self.latency = Histogram(
            "equitheta_request_duration_seconds",
            "Request latency by route.",
            ["route"],
            buckets=BUCKETS,
            registry=registry,
        )
        self.vectors = Counter(
            "equitheta_vectors_scored", "Response vectors scored, by bundle.", ["bundle"], registry=registry
        )
        gauge_mode = {"multiprocess_mode": "max"} if shared else {}
        self.bundles_loaded = Gauge(
            "equitheta_bundles_loaded",
            "Bundle versions held by a worker (the largest over workers).",
            registry=registry,
            **gauge_mode,
        )
        self.store_up = Gauge(
            "equitheta_store_up",
            "1 when the bundle store answers (the largest over workers).",
            registry=registry,
            **gauge_mode,
        )

    def observe_request(self, route: str, method: str, status: int, seconds: float) -> None:
        """Count one request by route template, method and status, and its duration."""
        self.requests.labels(route, method, str(status)).inc()
        self.latency.labels(route).observe(seconds)

    def count_vectors(self, bundle: str, n: int) -> None:
        """Count scored vectors for one bundle."""
        self.vectors.labels(bundle).inc(n)

    def set_state(self, *, bundles_loaded: int, store_up: bool) -> None:
        """Set the readiness gauges."""
        self.bundles_loaded.set(bundles_loaded)
        self.store_up.set(1.0 if store_up else 0.0)

    def render(self) -> bytes:
        """The Prometheus text exposition (every worker's counters when several run)."""
        if self._registry is not None:
            return generate_latest(self._registry)
        registry = CollectorRegistry()
        prometheus_multiprocess.MultiProcessCollector(registry)
        return generate_latest(registry)
