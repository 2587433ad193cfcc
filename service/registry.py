"""The replica's view of the bundle store: verified bundles and scorers, built once per version.

Versions never change, so a loaded version is cached for good. Aliases and version
lists are read from the store on each unpinned request and remembered; when the
store is unreachable the replica keeps scoring from what it remembers and reports
itself degraded. With a Redis store a listener thread follows the publish channel
and loads new versions and alias moves as they happen, so every replica is warm.
"""

from __future__ import annotations

import json
import logging
import threading
import time
from dataclasses import dataclass, field

from calibration.bundle import Bundle, BundleNotFound, BundleStore, DirectoryStore
from calibration.bundle.canonical import BundleError, BundleIntegrityError
from calibration.bundle.scorer import BundleScorer
from calibration.bundle.store import DEFAULT_ALIAS, find_identical

log = logging.getLogger("equitheta.service")

try:  # the Redis store is optional
    from calibration.bundle.redis_store import RedisStore, StoreUnavailable
except ImportError:  # pragma: no cover - redis is a service dependency
    RedisStore = None  # type: ignore[assignment,misc]

    class StoreUnavailable(BundleError):  # type: ignore[no-redef]
        pass


@dataclass
class LoadedBundle:
    bundle: Bundle
    scorer: BundleScorer


@dataclass
class StoreView:
    versions: dict[str, list[int]] = field(default_factory=dict)
    aliases: dict[str, dict[str, int]] = field(default_factory=dict)


class BundleRegistry:
    def __init__(self, store: BundleStore) -> None:
        self.store = store
        self._loaded: dict[tuple[str, int], LoadedBundle] = {}
        self._view = StoreView()
        self._lock = threading.Lock()
        self.degraded_reason: str | None = None
        self._stop = threading.Event()
        self._listener: threading.Thread | None = None

    # -- state --------------------------------------------------------------------------------------
    @property
    def loaded_count(self) -> int:
        return len(self._loaded)

    def _mark(self, error: Exception | None) -> None:
        if error is None:
            if self.degraded_reason is not None:
                log.info("bundle store reachable again")
            self.degraded_reason = None
        else:
            if self.degraded_reason is None:
                log.warning("bundle store unreachable; serving cached bundles: %s", error)
            self.degraded_reason = str(error)

    def reachable(self) -> bool:
        """Probe the store now (used by /readyz)."""
        if isinstance(self.store, DirectoryStore):
            ok = self.store.root.is_dir()
            self._mark(None if ok else StoreUnavailable(f"bundle directory {self.store.root} does not exist"))
            return ok
        if RedisStore is not None and isinstance(self.store, RedisStore):
            ok = self.store.ping()
            self._mark(None if ok else StoreUnavailable(f"Redis at {self.store.url} does not answer"))
            return ok
        return True

    # -- loading ------------------------------------------------------------------------------------
    def _load(self, name: str, version: int) -> LoadedBundle:
        key = (name, version)
        cached = self._loaded.get(key)
        if cached is not None:
            return cached
        bundle = self.store.get(name, version)
        loaded = LoadedBundle(bundle, BundleScorer(bundle))
        with self._lock:
            self._loaded.setdefault(key, loaded)
        return self._loaded[key]

    def preload(self) -> None:
        """Load every version of every bundle (start-up)."""
        try:
            for name in self.store.names():
                self._refresh_view(name)
                for version in self._view.versions.get(name, []):
                    try:
                        self._load(name, version)
                    except BundleIntegrityError as exc:
                        log.error("refusing damaged bundle %s@%s: %s", name, version, exc)
            self._mark(None)
        except StoreUnavailable as exc:
            self._mark(exc)

    def _refresh_view(self, name: str) -> None:
        versions = self.store.versions(name)
        aliases = {a: r.version for a, r in self.store.aliases(name).items()}
        with self._lock:
            self._view.versions[name] = versions
            self._view.aliases[name] = aliases

    # -- resolution ---------------------------------------------------------------------------------
    def get(self, name: str, version: int) -> LoadedBundle:
        try:
            loaded = self._load(name, version)
            self._mark(None)
            return loaded
        except StoreUnavailable as exc:
            self._mark(exc)
            raise

    def _refresh_or_remembered(self, name: str) -> None:
        """Re-read a name's versions and aliases; when the store is down keep what was seen before."""
        try:
            self._refresh_view(name)
            self._mark(None)
        except StoreUnavailable as exc:
            self._mark(exc)
            if name not in self._view.versions:
                raise

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
        try:
            names = self.store.names()
            for name in names:
                self._refresh_view(name)
            self._mark(None)
        except StoreUnavailable as exc:
            self._mark(exc)
            names = sorted(self._view.versions)
        return {n: (self._view.versions.get(n, []), self._view.aliases.get(n, {})) for n in names}

    def versions(self, name: str) -> tuple[list[int], dict[str, int]]:
        self._refresh_or_remembered(name)
        versions = self._view.versions.get(name, [])
        if not versions:
            raise BundleNotFound(f"no bundle named {name!r}")
        return versions, self._view.aliases.get(name, {})

    # -- writing ------------------------------------------------------------------------------------
    def put_version(self, bundle: Bundle) -> tuple[Bundle, bool]:
        """Publish at the bundle's version; returns (stored bundle, created?).

        The store decides: same content again returns the stored bundle, other content raises
        VersionConflict. Whether the version existed before is read from the version list.
        """
        existed = bundle.version in self.store.versions(bundle.name)
        stored = self.store.put_version(bundle)
        if not existed:
            self._refresh_view(bundle.name)
        return stored, not existed

    def publish(self, bundle: Bundle) -> tuple[Bundle, bool]:
        """Publish as the next version, unless an identical calibration is already published.

        Returns (stored bundle, created?); the rule is the CLI's (:func:`find_identical`).
        """
        identical = find_identical(self.store, bundle)
        if identical is not None:
            return identical, False
        stored = self.store.publish(bundle)
        self._refresh_view(bundle.name)
        return stored, True

    def set_alias(self, name: str, alias: str, version: int) -> int:
        record = self.store.set_alias(name, alias, version)
        self._refresh_view(name)
        return record.version

    # -- change feed (Redis) ------------------------------------------------------------------------
    def start_listener(self) -> None:
        if RedisStore is None or not isinstance(self.store, RedisStore):
            return
        self._listener = threading.Thread(target=self._listen, name="equitheta-bundle-events", daemon=True)
        self._listener.start()

    def stop(self) -> None:
        self._stop.set()

    def _listen(self) -> None:
        assert RedisStore is not None and isinstance(self.store, RedisStore)
        while not self._stop.is_set():
            try:
                pubsub = self.store.client.pubsub(ignore_subscribe_messages=True)
                pubsub.subscribe(self.store.channel)
                self.preload()  # catch up on anything missed while disconnected
                while not self._stop.is_set():
                    message = pubsub.get_message(timeout=0.5)
                    if message is not None:
                        self._on_event(message["data"])
                pubsub.close()
            except Exception as exc:  # connection lost: mark degraded, retry
                self._mark(StoreUnavailable(str(exc)))
                time.sleep(0.5)

    def _on_event(self, data: bytes) -> None:
        try:
            event = json.loads(data)
            name = event["name"]
            self._refresh_view(name)
            if event.get("kind") == "version":
                self._load(name, int(event["version"]))
            self._mark(None)
        except (BundleError, ValueError, KeyError) as exc:
            log.warning("could not apply bundle event %r: %s", data, exc)
