"""The Redis bundle store: the directory store's contract over Redis, shared by every replica.

Keys (``P`` is the key prefix, default ``equitheta``)::

    P:bundle:NAME:VERSION        canonical bundle bytes (written once)
    P:versions:NAME              sorted set of published versions
    P:names                      set of bundle names
    P:aliases:NAME               hash alias -> version
    P:alias-history:NAME:ALIAS   list of "version|time" moves, oldest first
    P:events                     pub/sub channel: {"kind": "version"|"alias", "name": ..., ...}

A version is written by one Lua script that sets the document (if the key is free),
indexes it and announces it: the steps cannot be separated by a dropped connection,
the version is never half-visible, and of concurrent writers of one version exactly
one is told it created it. The next version number is one more than the highest
indexed one, chosen again when another writer took it, so no number is skipped.
Connection failures surface as :class:`StoreUnavailable`; messages and ``repr`` show
the URL without its credentials.
"""

from __future__ import annotations

import contextlib
import json
import threading
from collections.abc import Iterator
from typing import Any

import redis
from redis.backoff import NoBackoff
from redis.retry import Retry

from calibration.bundle.canonical import from_bytes, seal, to_bytes
from calibration.bundle.schema import Bundle, valid_alias, valid_name
from calibration.bundle.store import (
    UNKNOWN_MOVER,
    AliasMove,
    AliasRecord,
    check_placed_version,
    mover_text,
    now_utc,
    same_or_conflict,
)
from calibration.errors import (
    BundleError,
    BundleIntegrityError,
    BundleNotFound,
    InvalidReference,
    StoreUnavailable,
    redact_url,
)

EVENTS = "events"
# Health probes use their own connection with a short timeout, so a stalled server is noticed quickly.
PING_TIMEOUT = 0.5

# Write one version atomically. KEYS = document, versions zset, names set;
# ARGV = document bytes, version, name, event, channel. Returns 1 when this call created it;
# 0 when the key existed (it is then indexed, which also repairs a write that an older
# two-step writer left unindexed).
_WRITE_VERSION = """
local created = 0
if redis.call('EXISTS', KEYS[1]) == 0 then
  redis.call('SET', KEYS[1], ARGV[1])
  created = 1
end
redis.call('ZADD', KEYS[2], ARGV[2], ARGV[2])
redis.call('SADD', KEYS[3], ARGV[3])
if created == 1 then redis.call('PUBLISH', ARGV[5], ARGV[4]) end
return created
"""

# Atomic alias move with history: KEYS = aliases hash, history list; ARGV = alias, version, time.
_SET_ALIAS = """
redis.call('HSET', KEYS[1], ARGV[1], ARGV[2])
redis.call('RPUSH', KEYS[2], ARGV[2] .. '|' .. ARGV[3])
return 1
"""
# Move back: the version before the last move; -1 when there is none.
_ALIAS_BACK = """
local n = redis.call('LLEN', KEYS[2])
if n < 2 then return -1 end
local previous = redis.call('LINDEX', KEYS[2], n - 2)
local version = string.match(previous, '^(%d+)|')
redis.call('HSET', KEYS[1], ARGV[1], version)
redis.call('RPUSH', KEYS[2], version .. '|' .. ARGV[2])
return tonumber(version)
"""


def _move(entry: str) -> AliasMove:
    """A history entry ``version|moved_at|by`` (``by`` missing in entries written before it was kept)."""
    version, moved_at, *by = entry.split("|", 2)
    return AliasMove(int(version), moved_at, by[0] if by else UNKNOWN_MOVER)


class RedisStore:
    """Bundles in Redis (see the module docstring for the layout)."""

    def __init__(self, url: str, *, prefix: str = "equitheta", timeout: float = 2.0) -> None:
        self.url = url
        self.prefix = prefix
        # No client-side retries: redis-py's default (3 retries with back-off up to 10 s) turns one stalled
        # call into half a minute; a failure is reported at once and the caller's probe does the retrying.
        no_retry = {"retry": Retry(NoBackoff(), 0), "retry_on_error": []}
        self.client = redis.Redis.from_url(url, socket_timeout=timeout, socket_connect_timeout=timeout, **no_retry)
        self._health = redis.Redis.from_url(
            url, socket_timeout=PING_TIMEOUT, socket_connect_timeout=PING_TIMEOUT, **no_retry
        )
        self._write_version = self.client.register_script(_WRITE_VERSION)
        self._set_alias = self.client.register_script(_SET_ALIAS)
        self._alias_back = self.client.register_script(_ALIAS_BACK)

    def __repr__(self) -> str:
        return f"RedisStore({redact_url(self.url)!r}, prefix={self.prefix!r})"

    def key(self, *parts: str | int) -> str:
        """The Redis key of these parts under the store's prefix."""
        return ":".join([self.prefix, *map(str, parts)])

    @property
    def channel(self) -> str:
        """The publish channel every replica listens on for version and alias changes."""
        return self.key(EVENTS)

    def call(self, fn: Any, *args: Any, **kwargs: Any) -> Any:
        """Run one client operation; a lost or stalled connection raises :class:`StoreUnavailable`."""
        try:
            return fn(*args, **kwargs)
        except (redis.ConnectionError, redis.TimeoutError) as exc:
            raise StoreUnavailable(
                f"the shared bundle store at {redact_url(self.url)} is unreachable: {self._scrub(str(exc))}"
            ) from exc

    def _scrub(self, text: str) -> str:
        """A client error message with the URL's password taken out, should the client ever quote it."""
        password = self.client.connection_pool.connection_kwargs.get("password")
        return text.replace(password, "***") if password else text

    def change_token(self, name: str) -> None:  # noqa: ARG002 - the contract's signature
        """None: Redis replicas learn of changes through the change feed (:meth:`events`)."""
        return None

    def ping(self) -> bool:
        """Whether Redis answers (raises nothing; False when it does not)."""
        try:
            return bool(self._health.ping())
        except (redis.ConnectionError, redis.TimeoutError, redis.ResponseError):
            return False

    def events(self, stop: threading.Event) -> Iterator[dict[str, Any] | None]:
        """The publish channel: None on (re)subscribing, then each event, until ``stop`` is set."""
        pubsub = self.client.pubsub(ignore_subscribe_messages=True)
        try:
            self.call(pubsub.subscribe, self.channel)
            yield None
            while not stop.is_set():
                message = self.call(pubsub.get_message, timeout=0.5)
                if message is None:
                    continue
                try:
                    yield json.loads(message["data"])
                except (ValueError, TypeError):
                    continue  # not one of ours
        finally:
            with contextlib.suppress(redis.RedisError):
                pubsub.close()

    @staticmethod
    def _check_name(name: str) -> None:
        if not valid_name(name):
            raise InvalidReference(f"bundle name {name!r} is not valid")

    def names(self) -> list[str]:
        """Every bundle name, sorted."""
        return sorted(n.decode() for n in self.call(self.client.smembers, self.key("names")))

    def versions(self, name: str) -> list[int]:
        """Published versions of ``name``, ascending."""
        self._check_name(name)
        return [int(v) for v in self.call(self.client.zrange, self.key("versions", name), 0, -1)]

    def get(self, name: str, version: int) -> Bundle:
        """One published version, verified against its hash."""
        self._check_name(name)
        data = self.call(self.client.get, self.key("bundle", name, version))
        if data is None:
            have = self.versions(name)
            if not have:
                raise BundleNotFound(f"no bundle named {name!r}")
            raise BundleNotFound(f"bundle {name!r} has no version {version} (versions: {', '.join(map(str, have))})")
        key = self.key("bundle", name, version)
        bundle = from_bytes(data, source=f"{name}@{version}", location=f"redis key {key}")
        if bundle.name != name or bundle.version != version:
            raise BundleIntegrityError(f"{name}@{version}: the stored document is {bundle.label}", location=key)
        return bundle

    def _write(self, bundle: Bundle) -> bool:
        """Write, index and announce one version in one atomic step; False when it already existed."""
        event = json.dumps({"kind": "version", "name": bundle.name, "version": bundle.version})
        created = self.call(
            self._write_version,
            keys=[
                self.key("bundle", bundle.name, bundle.version),
                self.key("versions", bundle.name),
                self.key("names"),
            ],
            args=[to_bytes(bundle), bundle.version, bundle.name, event, self.channel],
        )
        return bool(int(created))

    def publish(self, bundle: Bundle) -> Bundle:
        """Publish as the next version of the bundle's name (the document's version is ignored)."""
        self._check_name(bundle.name)
        for _ in range(100):
            newest = self.call(self.client.zrevrange, self.key("versions", bundle.name), 0, 0)
            sealed = seal(bundle, version=(int(newest[0]) + 1) if newest else 1)
            if self._write(sealed):
                return sealed
        raise BundleError(f"could not find a free version for {bundle.name!r} after 100 attempts")

    def put_version(self, bundle: Bundle) -> tuple[Bundle, bool]:
        """Publish at the document's version: ``(stored, True)`` if new, ``(existing, False)`` if identical."""
        self._check_name(bundle.name)
        sealed = check_placed_version(bundle)
        if self._write(sealed):
            return sealed, True
        return same_or_conflict(self.get(bundle.name, bundle.version), sealed), False

    def aliases(self, name: str) -> dict[str, AliasRecord]:
        """Aliases of ``name`` with their versions and history."""
        self._check_name(name)
        table = self.call(self.client.hgetall, self.key("aliases", name))
        out = {}
        for raw_alias, raw_version in table.items():
            alias = raw_alias.decode()
            history = self.call(self.client.lrange, self.key("alias-history", name, alias), 0, -1)
            moves = tuple(_move(h.decode()) for h in history)
            out[alias] = AliasRecord(alias=alias, version=int(raw_version), history=moves)
        return out

    def set_alias(self, name: str, alias: str, version: int, *, by: str = UNKNOWN_MOVER) -> AliasRecord:
        """Point ``alias`` at ``version`` (a published version), keeping the previous target in its history."""
        if not valid_alias(alias):
            raise InvalidReference(f"alias {alias!r} is not valid: a lower-case letter, then letters, digits, _ or -")
        self.get(name, version)
        self.call(
            self._set_alias,
            keys=[self.key("aliases", name), self.key("alias-history", name, alias)],
            args=[alias, version, f"{now_utc()}|{mover_text(by)}"],
        )
        self.call(
            self.client.publish,
            self.channel,
            json.dumps({"kind": "alias", "name": name, "alias": alias, "version": version}),
        )
        return self.aliases(name)[alias]

    def alias_back(self, name: str, alias: str, *, by: str = UNKNOWN_MOVER) -> AliasRecord:
        """Move ``alias`` back to the version it pointed at before."""
        self._check_name(name)
        if alias not in self.aliases(name):
            raise BundleNotFound(f"bundle {name!r} has no alias {alias!r}")
        version = self.call(
            self._alias_back,
            keys=[self.key("aliases", name), self.key("alias-history", name, alias)],
            args=[alias, f"{now_utc()}|{mover_text(by)}"],
        )
        if int(version) < 0:
            raise BundleError(f"alias {alias!r} of {name!r} has no earlier version to move back to")
        self.call(
            self.client.publish,
            self.channel,
            json.dumps({"kind": "alias", "name": name, "alias": alias, "version": int(version)}),
        )
        return self.aliases(name)[alias]
