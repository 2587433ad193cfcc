"""Shared helpers for the benchmark scripts: machine description and seeded data."""

from __future__ import annotations

import os
import platform
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import threadpoolctl

from calibration.irt.simulate import simulate_responses


def machine() -> str:
    blas = threadpoolctl.threadpool_info()
    blas_text = ", ".join(
        f"{b['internal_api']} {b.get('version')} ({b.get('architecture')}, {b['num_threads']} threads)" for b in blas
    )
    return (
        f"{platform.processor() or platform.machine()}, {os.cpu_count()} CPUs, Python {platform.python_version()}, "
        f"numpy {np.__version__}, BLAS: {blas_text}"
    )


def two_pl_data(n_persons: int, n_items: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Seeded 2PL responses (simulation only): responses (N, J), slopes, difficulties."""
    rng = np.random.default_rng(seed)
    a = rng.uniform(0.6, 2.0, n_items)
    b = rng.normal(0.0, 1.0, n_items)
    theta = rng.normal(size=n_persons)
    return simulate_responses(a, b, theta, rng), a, b


@dataclass(frozen=True)
class Timing:
    """Process CPU seconds (every thread) and wall seconds of one call."""

    cpu: float
    wall: float

    def __str__(self) -> str:
        return f"{self.cpu:7.2f} CPU s {self.wall:7.2f} wall s"


def measured(fn: Callable[[], Any]) -> tuple[Timing, Any]:
    """CPU and wall time of one call, and its result."""
    cpu, wall = time.process_time(), time.perf_counter()
    result = fn()
    return Timing(time.process_time() - cpu, time.perf_counter() - wall), result


def timed(fn: Callable[[], Any], repeat: int = 1) -> tuple[float, Any]:
    """Best wall time of ``repeat`` runs and the last result."""
    best, result = float("inf"), None
    for _ in range(repeat):
        start = time.perf_counter()
        result = fn()
        best = min(best, time.perf_counter() - start)
    return best, result
