"""The service's side of the drift watch: counts of scored batches, added to the shared Redis store.

Each worker keeps the counts of the batches it scores in memory and a background thread adds them to
Redis every ``EQUITHETA_DRIFT_FLUSH_SECONDS`` (and once more at shutdown), so a request costs an
in-memory sum, not a round trip. Counts that cannot be written while Redis is away are kept and added
at the next flush. What is counted, and the report, are in :mod:`calibration.bundle.drift_watch`.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Sequence

import numpy as np

from calibration.bundle.drift_watch import GroupCounts, add_counts, batch_counts
from calibration.bundle.redis_store import RedisStore
from calibration.errors import StoreUnavailable
from service.logs import log_event
from service.registry import LoadedBundle

Pending = dict[tuple[str, int], dict[str, GroupCounts]]


def _merge(into: Pending, key: tuple[str, int], counts: dict[str, GroupCounts]) -> None:
    held = into.setdefault(key, {})
    for group, more in counts.items():
        mine = held.get(group)
        if mine is None:
            held[group] = more
            continue
        mine.observed += more.observed
        mine.model += more.model
        mine.respondents += more.respondents


class DriftWatch:
    """Per-worker sums of scored batches, flushed to Redis by a background thread."""

    def __init__(self, store: RedisStore, interval: float) -> None:
        self.store, self.interval = store, interval
        self._pending: Pending = {}
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def observe(self, loaded: LoadedBundle, responses: np.ndarray, groups: Sequence[str]) -> None:
        """Count one scored batch (the answer matrix aligned to the bundle's items, and each row's group)."""
        counts = batch_counts(loaded.scorer, responses, groups)
        with self._lock:
            _merge(self._pending, (loaded.bundle.name, loaded.bundle.version), counts)

    def flush(self) -> None:
        """Add every held count to Redis; what cannot be written now is kept for the next flush."""
        with self._lock:
            pending, self._pending = self._pending, {}
        for key, counts in pending.items():
            try:
                add_counts(self.store, *key, counts.items())
            except StoreUnavailable as exc:
                log_event(logging.WARNING, "drift-watch-deferred", bundle=f"{key[0]}@{key[1]}", detail=str(exc))
                with self._lock:
                    _merge(self._pending, key, counts)

    def start(self) -> None:
        """Flush every ``interval`` seconds in a background thread."""

        def loop() -> None:
            while not self._stop.wait(self.interval):
                self.flush()

        self._thread = threading.Thread(target=loop, name="equitheta-drift-watch", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Stop the thread and add what is held (shutdown)."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=self.interval + 5)
        self.flush()
