"""Prometheus text-format metrics (a small thread-safe registry of our own)."""

from __future__ import annotations

import threading
from collections import defaultdict

BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0)


def _labels(pairs: tuple[tuple[str, str], ...]) -> str:
    if not pairs:
        return ""
    escaped = (f'{k}="{v.replace(chr(92), chr(92) * 2).replace(chr(34), chr(92) + chr(34))}"' for k, v in pairs)
    return "{" + ",".join(escaped) + "}"


class Metrics:
    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.requests: dict[tuple[tuple[str, str], ...], float] = defaultdict(float)
        self.vectors: dict[tuple[tuple[str, str], ...], float] = defaultdict(float)
        self.latency_buckets: dict[str, list[float]] = defaultdict(lambda: [0.0] * len(BUCKETS))
        self.latency_sum: dict[str, float] = defaultdict(float)
        self.latency_count: dict[str, float] = defaultdict(float)
        self.gauges: dict[str, float] = {}

    def observe_request(self, route: str, method: str, status: int, seconds: float) -> None:
        with self._lock:
            self.requests[(("route", route), ("method", method), ("status", str(status)))] += 1
            buckets = self.latency_buckets[route]
            for i, bound in enumerate(BUCKETS):
                if seconds <= bound:
                    buckets[i] += 1
            self.latency_sum[route] += seconds
            self.latency_count[route] += 1

    def count_vectors(self, bundle: str, n: int) -> None:
        with self._lock:
            self.vectors[(("bundle", bundle),)] += n

    def set_gauge(self, name: str, value: float) -> None:
        with self._lock:
            self.gauges[name] = value

    def render(self) -> str:
        lines = [
            "# HELP equitheta_requests_total HTTP requests by route, method and status.",
            "# TYPE equitheta_requests_total counter",
        ]
        with self._lock:
            lines += [f"equitheta_requests_total{_labels(k)} {v:g}" for k, v in sorted(self.requests.items())]
            lines += [
                "# HELP equitheta_request_duration_seconds Request latency by route.",
                "# TYPE equitheta_request_duration_seconds histogram",
            ]
            for route in sorted(self.latency_count):
                for bound, count in zip(BUCKETS, self.latency_buckets[route], strict=True):
                    lines.append(
                        f"equitheta_request_duration_seconds_bucket"
                        f"{_labels((('route', route), ('le', f'{bound:g}')))} {count:g}"
                    )
                lines.append(
                    f"equitheta_request_duration_seconds_bucket{_labels((('route', route), ('le', '+Inf')))} "
                    f"{self.latency_count[route]:g}"
                )
                lines.append(
                    f"equitheta_request_duration_seconds_sum{_labels((('route', route),))} "
                    f"{self.latency_sum[route]:.6f}"
                )
                lines.append(
                    f"equitheta_request_duration_seconds_count{_labels((('route', route),))} "
                    f"{self.latency_count[route]:g}"
                )
            lines += [
                "# HELP equitheta_vectors_scored_total Response vectors scored, by bundle.",
                "# TYPE equitheta_vectors_scored_total counter",
            ]
            lines += [f"equitheta_vectors_scored_total{_labels(k)} {v:g}" for k, v in sorted(self.vectors.items())]
            for name, value in sorted(self.gauges.items()):
                lines += [f"# TYPE {name} gauge", f"{name} {value:g}"]
        return "\n".join(lines) + "\n"
