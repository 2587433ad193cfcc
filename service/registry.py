"""The replica's view of the bundle store: verified bundles and scorers, built once per version.

Versions never change, so a loaded version is cached for good, and a version found
damaged is remembered as damaged (it is not re-read and re-hashed on every request).
Aliases and version lists are read from the store on unpinned requests and remembered.

Faults. A probe thread pings the store in the background. After a failure the replica
stops asking the store on the request path: it serves the aliases and versions it
remembers and answers writes with 503 at once, while the probe retries with back-off
(``RETRY_FIRST`` doubling to ``RETRY_MAX`` seconds) and clears the fault when the store
answers. A pinned version that is cached never touches the store at all.

A store that comes back empty (a Redis restarted without persistence) is re-seeded:
bundles are content-hashed and verified, so the replica writes back every version it
holds and its remembered aliases (``put_version`` is idempotent, so several replicas
doing it at once is harmless). A bundle deleted from the shared store by hand therefore
comes back while a replica still holds it; retire a version by moving its alias instead.
"""

from __future__ import annotations

import functools
import logging
import threading
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from calibration.bundle import Bundle, BundleNotFound, BundleStore
from calibration.bundle.scorer import BundleScorer
from calibration.bundle.store import DEFAULT_ALIAS, AliasRecord, find_identical
from calibration.errors import BundleError, BundleIntegrityError, StoreUnavailable
from service.logs import log_event

# Background probe: every PROBE_INTERVAL seconds while healthy; after a failure first after
# RETRY_FIRST seconds, doubling up to RETRY_MAX.
PROBE_INTERVAL = 1.0
RETRY_FIRST = 0.5
RETRY_MAX = 10.0


@dataclass
class LoadedBundle:
    """A verified bundle and its scorer, with what every score request against it looks up."""

    bundle: Bundle
    scorer: BundleScorer

    @functools.cached_property
    def item_index(self) -> dict[str, int]:
        """Each item's column in the scorer's answer matrix."""
        return {item: j for j, item in enumerate(self.scorer.item_ids)}

    @functools.cached_property
    def item_limits(self) -> np.ndarray:
        """Each item's number of categories, in column order (read-only)."""
        limits = np.asarray([self.scorer.item_categories[item] for item in self.scorer.item_ids], dtype=np.int64)
        limits.flags.writeable = False
        return limits

    @functools.cached_property
    def excluded_items(self) -> dict[str, list[dict[str, str]]]:
        """Per group, the items left out of its scores with the reason, as the response lists them (shared: do not
        modify)."""
        return {g: [{"item": i, "reason": r} for i, r in self.scorer.excluded_for(g)] for g in self.scorer.plans}


@dataclass
class StoreView:
    """The last listing of the store: versions and aliases by name."""

    versions: dict[str, list[int]] = field(default_factory=dict)
    aliases: dict[str, dict[str, int]] = field(default_factory=dict)


RESEEDED_BY = "a service replica, re-seeding a store that came back empty"
"""Who moved an alias that a replica wrote back to an emptied store (its alias history says so)."""

FEED_TRUST = 5.0
"""Seconds an unpinned request may rely on the change feed alone before the view is re-read from the store."""


class BundleRegistry:
    """Verified bundles and scorers shared by the routes, kept fresh by a background probe and the change feed."""

    def __init__(self, store: BundleStore) -> None:
        self.store = store
        self._loaded: dict[tuple[str, int], LoadedBundle] = {}
        self._damaged: dict[tuple[str, int], str] = {}
        self._view = StoreView()
        self._lock = threading.Lock()
        self.degraded_reason: str | None = None
        self._retry_delay = RETRY_FIRST
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        self.skipped_store_calls = 0  # requests answered from memory while the store was down
        self._feed_since: float | None = None  # monotonic time the change feed last (re)subscribed
        self._viewed: dict[str, float] = {}  # monotonic time each name's view was last read from the store
        self._tokens: dict[str, Any] = {}  # each name's change token when its view was read
        self._reading: dict[str, threading.Lock] = {}  # one store read of a name's view at a time
        self._read_outcome: dict[str, tuple[float, StoreUnavailable | None]] = {}  # when the last read ended, its error
        self.reseeded: list[str] = []  # name@version written back to a store that had lost them

    # -- state --------------------------------------------------------------------------------------
    @property
    def loaded_count(self) -> int:
        """Number of bundle versions held verified in memory."""
        return len(self._loaded)

    @property
    def damaged(self) -> list[str]:
        """Stored versions that failed verification, as ``name@version: reason``."""
        return sorted(f"{n}@{v}" for n, v in self._damaged)

    @property
    def store_up(self) -> bool:
        """Whether the store answered the last probe."""
        return self.degraded_reason is None

    def _mark(self, error: Exception | None) -> None:
        if error is not None:
            self._feed_since = None  # a store that failed a call: its change feed cannot be trusted
        if error is None:
            if self.degraded_reason is not None:
                log_event(logging.INFO, "store-reachable")
            self.degraded_reason = None
            self._retry_delay = RETRY_FIRST
        else:
            if self.degraded_reason is None:
                log_event(logging.WARNING, "store-unreachable", detail=str(error), serving="cached bundles")
            self.degraded_reason = str(error)

    def _store(self, call: Any, *args: Any) -> Any:
        """One store call on the request path; none at all while the store is known to be down."""
        if self.degraded_reason is not None:
            self.skipped_store_calls += 1
            raise StoreUnavailable(self.degraded_reason)
        try:
            return call(*args)
        except StoreUnavailable as exc:
            self._mark(exc)
            raise

    # -- loading ------------------------------------------------------------------------------------
    def _load(self, name: str, version: int) -> LoadedBundle:
        key = (name, version)
        cached = self._loaded.get(key)
        if cached is not None:
            return cached
        if key in self._damaged:
            raise BundleIntegrityError(self._damaged[key])
        try:
            bundle = self._store(self.store.get, name, version)
        except BundleIntegrityError as exc:
            self._damaged[key] = str(exc)
            log_event(
                logging.ERROR, "bundle-refused", bundle=f"{name}@{version}", detail=str(exc), location=exc.location
            )
            raise
        loaded = LoadedBundle(bundle, BundleScorer(bundle))
        with self._lock:
            self._loaded.setdefault(key, loaded)
        return self._loaded[key]

    def preload(self) -> None:
        """Load every version of every bundle (start-up, and after the change feed reconnects)."""
        try:
            names = set(self.store.names()) | {n for n, _ in self._loaded}
            for name in sorted(names):
                self._refresh_view(name)
                for version in self._view.versions.get(name, []):
                    try:
                        self._load(name, version)
                    except BundleIntegrityError:
                        pass  # remembered and logged by _load
            self._mark(None)
        except StoreUnavailable as exc:
            self._mark(exc)

    def _token(self, name: str) -> Any:
        try:
            return self.store.change_token(name)
        except (OSError, BundleError, StoreUnavailable):
            return None

    def _refresh_view(self, name: str) -> None:
        token = self._token(name)  # read before the view: a write during the refresh shows next time
        versions = self.store.versions(name)
        held = sorted(v for n, v in self._loaded if n == name)
        if any(v not in versions for v in held):
            versions = self._reseed(name, versions, held)
        aliases = {a: r.version for a, r in self.store.aliases(name).items()}
        remembered = self._view.aliases.get(name, {})
        lost = {a: v for a, v in remembered.items() if a not in aliases and v in versions}
        for alias, version in lost.items():
            aliases[alias] = self.store.set_alias(name, alias, version, by=RESEEDED_BY).version
        if lost:
            log_event(logging.WARNING, "aliases-reseeded", bundle=name, aliases=dict(lost))
        with self._lock:
            self._view.versions[name] = versions
            self._view.aliases[name] = aliases
            self._viewed[name] = time.monotonic()
            self._tokens[name] = token

    def _reseed(self, name: str, versions: list[int], held: list[int]) -> list[int]:
        """Write back the verified versions the store no longer has (it restarted empty)."""
        missing = [v for v in held if v not in versions]
        for version in missing:
            self.store.put_version(self._loaded[(name, version)].bundle)
            self.reseeded.append(f"{name}@{version}")
        log_event(logging.WARNING, "versions-reseeded", bundle=name, versions=missing, source="verified copies")
        return sorted(set(versions) | set(missing))

    # -- resolution ---------------------------------------------------------------------------------
    def held(self, name: str, version: int) -> LoadedBundle | None:
        """The version if this replica already holds it verified (no store call), else None."""
        return self._loaded.get((name, version))

    def get(self, name: str, version: int) -> LoadedBundle:
        """One verified version (from memory when held, else from the store)."""
        return self._load(name, version)

    def _refresh_or_remembered(self, name: str) -> None:
        """Re-read a name's versions and aliases; when the store is down keep what was seen before.

        One read per name at a time: callers that waited while another read the view take that read's
        result (a view now current, or the read's failure) instead of reading again; when a stale view
        met many requests at once, each of them used to read the store and open its own connection.
        """
        entered = time.monotonic()
        with self._lock:
            reading = self._reading.setdefault(name, threading.Lock())
        with reading:
            ended, error = self._read_outcome.get(name, (float("-inf"), None))
            if ended < entered and not self._view_current(name):
                error = None
                try:
                    self._store(self._refresh_view, name)
                except StoreUnavailable as exc:
                    error = exc
                self._read_outcome[name] = (time.monotonic(), error)
        if error is not None and name not in self._view.versions:
            raise error

    def default_held(self, name: str) -> LoadedBundle | None:
        """The default version from memory alone, when the view is known to be current; else None.

        With a live change feed (Redis) every publish and alias move reaches the view as an event; a
        store with a change token (the directory store: two stats) says whether anything was written
        since the view was read. Either way an unpinned request then needs no store read, and the view
        is still re-read at least every ``FEED_TRUST`` seconds.
        """
        if not self._view_current(name):
            return None
        version = self._default_version(name)
        return None if version is None else self.held(name, version)

    def _view_current(self, name: str) -> bool:
        """Whether the held view of ``name`` is known to be current (see :meth:`default_held`)."""
        if self.degraded_reason is not None:
            return False
        seen = self._viewed.get(name)
        if seen is None or time.monotonic() - seen > FEED_TRUST:
            return False
        if self._feed_since is not None:
            return seen >= self._feed_since
        token = self._token(name)
        return token is not None and token == self._tokens.get(name)

    def _default_version(self, name: str) -> int | None:
        aliases = self._view.aliases.get(name, {})
        if DEFAULT_ALIAS in aliases:
            return aliases[DEFAULT_ALIAS]
        versions = self._view.versions.get(name, [])
        return versions[-1] if versions else None

    def default(self, name: str) -> LoadedBundle:
        """The version the ``production`` alias points at, else the newest."""
        self._refresh_or_remembered(name)
        versions = self._view.versions.get(name, [])
        aliases = self._view.aliases.get(name, {})
        if DEFAULT_ALIAS in aliases:
            return self.get(name, aliases[DEFAULT_ALIAS])
        if not versions:
            raise BundleNotFound(f"no bundle named {name!r}")
        return self.get(name, versions[-1])

    def listing(self) -> dict[str, tuple[list[int], dict[str, int]]]:
        """Every bundle name with its versions and aliases."""
        try:
            # Names held here count too: a store that came back empty is re-seeded, not listed as empty.
            names = sorted(set(self._store(self.store.names)) | {n for n, _ in self._loaded})
            for name in names:
                self._store(self._refresh_view, name)
        except StoreUnavailable:
            names = sorted(self._view.versions)
        return {n: (self._view.versions.get(n, []), self._view.aliases.get(n, {})) for n in names}

    def versions(self, name: str) -> tuple[list[int], dict[str, int]]:
        """The versions and aliases of one bundle (404 when unknown)."""
        self._refresh_or_remembered(name)
        versions = self._view.versions.get(name, [])
        if not versions:
            raise BundleNotFound(f"no bundle named {name!r}")
        return versions, self._view.aliases.get(name, {})

    def alias_records(self, name: str) -> dict[str, AliasRecord]:
        """Every alias of ``name`` with its history, read from the store."""
        return self._store(self.store.aliases, name)  # type: ignore[no-any-return]

    def alias_record(self, name: str, alias: str) -> AliasRecord:
        """One alias with its history, read from the store (404 when the bundle or the alias is unknown)."""
        aliases = self.alias_records(name)
        if alias not in aliases:
            self.versions(name)  # an unknown bundle says so first
            known = ", ".join(sorted(aliases)) or "none"
            raise BundleNotFound(f"bundle {name!r} has no alias {alias!r} (aliases: {known})")
        return aliases[alias]  # type: ignore[no-any-return]

    # -- writing ------------------------------------------------------------------------------------
    def put_version(self, bundle: Bundle) -> tuple[Bundle, bool]:
        """Publish at the bundle's version; returns (stored bundle, created?) from the atomic write."""
        stored, created = self._store(self.store.put_version, bundle)
        if created:
            self._store(self._refresh_view, bundle.name)
        return stored, created

    def publish(self, bundle: Bundle) -> tuple[Bundle, bool]:
        """Publish as the next version, unless an identical calibration is already published.

        Returns (stored bundle, created?); the rule is the CLI's (:func:`find_identical`).
        """
        identical = self._store(find_identical, self.store, bundle)
        if identical is not None:
            return identical, False
        stored = self._store(self.store.publish, bundle)
        self._store(self._refresh_view, bundle.name)
        return stored, True

    def set_alias(self, name: str, alias: str, version: int, *, by: str) -> int:
        """Point an alias at a published version (``by``: who, for its history); the version it now points at."""
        record = self._store(functools.partial(self.store.set_alias, by=by), name, alias, version)
        self._store(self._refresh_view, name)
        return int(record.version)

    # -- background: probe and change feed ----------------------------------------------------------
    def start(self) -> None:
        """Start the probe and, where the store has one, the change-feed listener."""
        for target, label in ((self._probe, "probe"), (self._listen, "events")):
            thread = threading.Thread(target=target, name=f"equitheta-bundle-{label}", daemon=True)
            thread.start()
            self._threads.append(thread)

    def stop(self) -> None:
        """Stop the background probe and the change feed."""
        self._stop.set()

    def _probe(self) -> None:
        while not self._stop.is_set():
            if self.store.ping():
                if self.degraded_reason is not None:
                    self._mark(None)
                    self.preload()  # catch up, and re-seed a store that came back empty
                delay = PROBE_INTERVAL
            else:
                self._mark(StoreUnavailable(f"the bundle store does not answer ({self.store!r})"))
                delay, self._retry_delay = self._retry_delay, min(self._retry_delay * 2, RETRY_MAX)
            self._stop.wait(delay)

    def _listen(self) -> None:
        while not self._stop.is_set():
            try:
                for event in self.store.events(self._stop):
                    if event is None:  # (re)subscribed: catch up on anything missed while disconnected
                        subscribed = time.monotonic()
                        self.preload()
                        self._feed_since = subscribed if self.degraded_reason is None else None
                    else:
                        self._on_event(event)
                self._feed_since = None
                return  # a store without a change feed, or stopping
            except StoreUnavailable as exc:
                self._mark(exc)
                self._stop.wait(RETRY_FIRST)

    def _on_event(self, event: dict[str, Any]) -> None:
        try:
            name = event["name"]
            self._refresh_view(name)
            if event.get("kind") == "version":
                self._load(name, int(event["version"]))
        except StoreUnavailable as exc:
            self._mark(exc)
        except (BundleError, ValueError, KeyError) as exc:
            log_event(logging.WARNING, "event-ignored", event_body=repr(event), detail=str(exc))
