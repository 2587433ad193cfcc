"""The Redis bundle store: the directory store's contract over Redis, shared by every replica.

Keys (``P`` is the key prefix, default ``equitheta``)::

    P:bundle:NAME:VERSION        canonical bundle bytes (written once with SET NX)
    P:versions:NAME              sorted set of published versions
    P:names                      set of bundle names
    P:next:NAME                  counter for the next version number
    P:aliases:NAME               hash alias -> version
    P:alias-history:NAME:ALIAS   list of "version|time" moves, oldest first
    P:events                     pub/sub channel: {"kind": "version"|"alias", "name": ..., ...}

A version is one ``SET NX`` of the whole document: it is never half-visible and
of two concurrent writers of one version exactly one succeeds. Connection
failures surface as :class:`StoreUnavailable`.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from typing import Any

import redis

from calibration.bundle.canonical import BundleError, BundleIntegrityError, from_bytes, seal, to_bytes
from calibration.bundle.schema import Bundle, valid_alias, valid_name
from calibration.bundle.store import AliasRecord, BundleNotFound, InvalidReference, VersionConflict

EVENTS = "events"

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


class StoreUnavailable(BundleError):
    """The shared store cannot be reached (reads may still be served from a cache)."""


def _now() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


class RedisStore:
    """Bundles in Redis (see the module docstring for the layout)."""

    def __init__(self, url: str, *, prefix: str = "equitheta", timeout: float = 2.0) -> None:
        self.url = url
        self.prefix = prefix
        self.client = redis.Redis.from_url(url, socket_timeout=timeout, socket_connect_timeout=timeout)
        self._set_alias = self.client.register_script(_SET_ALIAS)
        self._alias_back = self.client.register_script(_ALIAS_BACK)

    def __repr__(self) -> str:
        return f"RedisStore({self.url!r}, prefix={self.prefix!r})"

    def key(self, *parts: str | int) -> str:
        return ":".join([self.prefix, *map(str, parts)])

    @property
    def channel(self) -> str:
        return self.key(EVENTS)

    def _call(self, fn: Any, *args: Any, **kwargs: Any) -> Any:
        try:
            return fn(*args, **kwargs)
        except (redis.ConnectionError, redis.TimeoutError) as exc:
            raise StoreUnavailable(f"the shared bundle store at {self.url} is unreachable: {exc}") from exc

    def ping(self) -> bool:
        try:
            return bool(self.client.ping())
        except (redis.ConnectionError, redis.TimeoutError):
            return False

    @staticmethod
    def _check_name(name: str) -> None:
        if not valid_name(name):
            raise InvalidReference(f"bundle name {name!r} is not valid")

    def names(self) -> list[str]:
        return sorted(n.decode() for n in self._call(self.client.smembers, self.key("names")))

    def versions(self, name: str) -> list[int]:
        self._check_name(name)
        return [int(v) for v in self._call(self.client.zrange, self.key("versions", name), 0, -1)]

    def get(self, name: str, version: int) -> Bundle:
        self._check_name(name)
        data = self._call(self.client.get, self.key("bundle", name, version))
        if data is None:
            have = self.versions(name)
            if not have:
                raise BundleNotFound(f"no bundle named {name!r}")
            raise BundleNotFound(f"bundle {name!r} has no version {version} (versions: {', '.join(map(str, have))})")
        bundle = from_bytes(data, source=f"{name}@{version} (redis {self.key('bundle', name, version)})")
        if bundle.name != name or bundle.version != version:
            raise BundleIntegrityError(f"{name}@{version}: the stored document is {bundle.label}")
        return bundle

    def _write(self, bundle: Bundle) -> bool:
        """SET NX the document, then index it; False when the version already exists."""
        created = self._call(
            self.client.set, self.key("bundle", bundle.name, bundle.version), to_bytes(bundle), nx=True
        )
        if not created:
            return False
        pipe = self.client.pipeline()
        pipe.zadd(self.key("versions", bundle.name), {str(bundle.version): bundle.version})
        pipe.sadd(self.key("names"), bundle.name)
        pipe.publish(self.channel, json.dumps({"kind": "version", "name": bundle.name, "version": bundle.version}))
        self._call(pipe.execute)
        return True

    def publish(self, bundle: Bundle) -> Bundle:
        self._check_name(bundle.name)
        for _ in range(100):
            version = int(self._call(self.client.incr, self.key("next", bundle.name)))
            sealed = seal(bundle, version=version)
            if self._write(sealed):
                return sealed
        raise BundleError(f"could not find a free version for {bundle.name!r} after 100 attempts")

    def put_version(self, bundle: Bundle) -> Bundle:
        self._check_name(bundle.name)
        if bundle.version < 1:
            raise InvalidReference("a published version number starts at 1")
        sealed = seal(bundle)
        if bundle.hash and bundle.hash != sealed.hash:
            raise BundleIntegrityError(f"{bundle.label}: the stated hash does not match the content; refused")
        if self._write(sealed):
            # Keep the counter ahead of explicitly placed versions.
            script = (
                "if tonumber(redis.call('GET', KEYS[1]) or '0') < tonumber(ARGV[1]) then "
                "redis.call('SET', KEYS[1], ARGV[1]) end return 1"
            )
            self._call(self.client.eval, script, 1, self.key("next", bundle.name), bundle.version)
            return sealed
        existing = self.get(bundle.name, bundle.version)
        if existing.hash != sealed.hash:
            raise VersionConflict(
                f"{bundle.label} is already published with other content (hash {existing.hash[:12]}...); "
                "a published version never changes: publish a new version instead"
            )
        return existing

    def aliases(self, name: str) -> dict[str, AliasRecord]:
        self._check_name(name)
        table = self._call(self.client.hgetall, self.key("aliases", name))
        out = {}
        for raw_alias, raw_version in table.items():
            alias = raw_alias.decode()
            history = self._call(self.client.lrange, self.key("alias-history", name, alias), 0, -1)
            moves = tuple((int(h.decode().split("|")[0]), h.decode().split("|")[1]) for h in history)
            out[alias] = AliasRecord(alias=alias, version=int(raw_version), history=moves)
        return out

    def set_alias(self, name: str, alias: str, version: int) -> AliasRecord:
        if not valid_alias(alias):
            raise InvalidReference(f"alias {alias!r} is not valid: a lower-case letter, then letters, digits, _ or -")
        self.get(name, version)
        self._call(
            self._set_alias,
            keys=[self.key("aliases", name), self.key("alias-history", name, alias)],
            args=[alias, version, _now()],
        )
        self._call(
            self.client.publish,
            self.channel,
            json.dumps({"kind": "alias", "name": name, "alias": alias, "version": version}),
        )
        return self.aliases(name)[alias]

    def alias_back(self, name: str, alias: str) -> AliasRecord:
        self._check_name(name)
        if alias not in self.aliases(name):
            raise BundleNotFound(f"bundle {name!r} has no alias {alias!r}")
        version = self._call(
            self._alias_back,
            keys=[self.key("aliases", name), self.key("alias-history", name, alias)],
            args=[alias, _now()],
        )
        if int(version) < 0:
            raise BundleError(f"alias {alias!r} of {name!r} has no earlier version to move back to")
        self._call(
            self.client.publish,
            self.channel,
            json.dumps({"kind": "alias", "name": name, "alias": alias, "version": int(version)}),
        )
        return self.aliases(name)[alias]
