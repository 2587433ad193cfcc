"""Bundle stores: the one contract, references ``NAME[@VERSION|@ALIAS]``, and ``open_store``.

Contract
--------
- ``publish(bundle)`` gives the bundle the next integer version of its name and
  stores it; ``put_version(bundle)`` stores a bundle at the version it carries and
  returns (stored bundle, created): same content again is accepted with ``created``
  False, other content is a :class:`VersionConflict`. ``created`` comes from the
  atomic write itself, so of concurrent identical writers exactly one sees True.
- A stored version never changes and is never half-visible.
- ``ping()`` says whether the store answers (without raising).
- ``change_token(name)`` is a cheap value that changes with every publish or alias move of
  ``name`` (the directory store: two stats), or None for a store that relies on its change feed.
- ``events(stop)`` is the change feed: ``None`` each time it (re)subscribes, then one dict
  per published version or alias move, until ``stop`` is set; a store without a feed
  yields nothing. A lost connection raises :class:`StoreUnavailable`.
- Aliases (e.g. ``production``) point at versions, can be moved, and keep their
  history so they can be moved back; each move records when and by whom (``by``: the
  API key's name, the command line's user).

The directory store lives in :mod:`calibration.bundle.directory_store`, the Redis store in
:mod:`calibration.bundle.redis_store`; :func:`open_store` picks one from a ``--store`` value.
"""

from __future__ import annotations

import hashlib
import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Protocol

from calibration.bundle.canonical import canonical_bytes, document_of, seal
from calibration.bundle.schema import Bundle, valid_alias, valid_name
from calibration.errors import (
    BundleError,
    BundleIntegrityError,
    BundleNotFound,
    InvalidBundleDocument,
    InvalidReference,
    VersionConflict,
)

DEFAULT_ALIAS = "production"
REDIS_SCHEMES = ("redis://", "rediss://", "unix://")
"""A ``--store`` value starting with one of these names the shared Redis store."""


@dataclass(frozen=True)
class AliasMove:
    """One move of an alias: the version it then pointed at, when (UTC, ISO 8601) and who moved it."""

    version: int
    moved_at: str
    by: str  # the API key's name, the command line's user, or "unknown" (a move recorded before 0.2)


@dataclass(frozen=True)
class AliasRecord:
    """Where an alias points now, and every move that led there (oldest first, the current one last)."""

    alias: str
    version: int
    history: tuple[AliasMove, ...]


def now_utc() -> str:
    """The time of a move, UTC, ISO 8601 to the second."""
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


UNKNOWN_MOVER = "unknown"
"""Who moved an alias, for moves recorded before the mover was kept."""


def mover_text(by: str) -> str:
    """Who moved an alias, as stored: one line, no field separator, at most 200 characters."""
    text = " ".join(by.split()).replace("|", "/")[:200]
    return text or UNKNOWN_MOVER


class BundleStore(Protocol):
    """The contract every bundle store keeps: immutable versions, aliases, a ping and a change feed."""

    def names(self) -> list[str]:
        """Every bundle name, sorted."""

    def versions(self, name: str) -> list[int]:
        """Published versions of ``name``, ascending."""

    def get(self, name: str, version: int) -> Bundle:
        """One published version, verified against its hash."""

    def publish(self, bundle: Bundle) -> Bundle:
        """Publish as the next version of the bundle's name."""

    def put_version(self, bundle: Bundle) -> tuple[Bundle, bool]:
        """Publish at the document's version: ``(stored, True)`` if new, ``(existing, False)`` if identical."""

    def ping(self) -> bool:
        """Whether the store answers."""

    def change_token(self, name: str) -> Any:
        """A cheap value that changes with every write to ``name`` (None: the store has none; use the feed)."""

    def events(self, stop: threading.Event) -> Iterator[dict[str, Any] | None]:
        """Version and alias changes as they happen, until ``stop`` is set."""

    def aliases(self, name: str) -> dict[str, AliasRecord]:
        """Aliases of ``name`` with their versions and history."""

    def set_alias(self, name: str, alias: str, version: int, *, by: str = UNKNOWN_MOVER) -> AliasRecord:
        """Point ``alias`` at a published ``version``; ``by`` names who moved it."""

    def alias_back(self, name: str, alias: str, *, by: str = UNKNOWN_MOVER) -> AliasRecord:
        """Move ``alias`` back to the version it pointed at before; ``by`` names who moved it."""


def check_placed_version(bundle: Bundle) -> Bundle:
    """The sealed bundle for ``put_version``, after the checks every store makes."""
    if bundle.version < 1:
        raise InvalidReference("a published version number starts at 1")
    sealed = seal(bundle)
    if bundle.hash and bundle.hash != sealed.hash:
        raise InvalidBundleDocument(f"{bundle.label}: the stated hash does not match the content; refused")
    return sealed


def same_or_conflict(existing: Bundle, sealed: Bundle) -> Bundle:
    """The stored version when it holds the same content, else a :class:`VersionConflict`."""
    if existing.hash != sealed.hash:
        raise VersionConflict(
            f"{sealed.label} is already published with other content (hash {existing.hash[:12]}...); "
            "a published version never changes: publish a new version instead"
        )
    return existing


def parse_reference(reference: str) -> tuple[str, int | str | None]:
    """``NAME``, ``NAME@VERSION`` or ``NAME@ALIAS`` -> (name, version or alias or None)."""
    name, _, ref = reference.partition("@")
    if not valid_name(name):
        raise InvalidReference(
            f"bundle name {name!r} is not valid: lower-case letters, digits, '.', '_' or '-', up to 64"
        )
    if not ref:
        return name, None
    if ref.isdigit():
        return name, int(ref)
    if not valid_alias(ref):
        raise InvalidReference(f"{ref!r} is neither a version number nor a valid alias")
    return name, ref


def resolve(store: BundleStore, reference: str) -> Bundle:
    """The bundle a reference names; a bare name means the ``production`` alias, else the newest."""
    name, ref = parse_reference(reference)
    if isinstance(ref, int):
        return store.get(name, ref)
    aliases = store.aliases(name)
    if isinstance(ref, str):
        if ref not in aliases:
            known = ", ".join(sorted(aliases)) or "none"
            raise BundleNotFound(f"bundle {name!r} has no alias {ref!r} (aliases: {known})")
        return store.get(name, aliases[ref].version)
    if DEFAULT_ALIAS in aliases:
        return store.get(name, aliases[DEFAULT_ALIAS].version)
    versions = store.versions(name)
    if not versions:
        raise BundleNotFound(f"no bundle named {name!r}")
    return store.get(name, versions[-1])


MAX_LINK_CHAIN = 100
"""Links followed from a version to the version whose scale it uses (a longer chain is cut there)."""


def scale_chain(get: Callable[[str, int], Bundle], bundle: Bundle) -> list[str]:
    """Labels from ``bundle`` along its links to the version whose scale it uses (the last; itself when unlinked).

    ``get(name, version)`` reads a published version (a store's ``get``, or the service's verified cache).
    A parent that can no longer be read ends the chain at its label (its scale is still the one named).
    """
    chain, current = [bundle.label], bundle
    while current.link is not None and len(chain) < MAX_LINK_CHAIN:
        name, version = parse_reference(current.link.parent)
        chain.append(current.link.parent)
        try:
            current = get(name, int(version))  # type: ignore[arg-type]
        except BundleError:
            break
    return chain


# Fields that differ between two publications of the same calibration.
PUBLICATION_FIELDS = ("hash", "version", "created_at")


def calibration_fingerprint(bundle: Bundle) -> str:
    """SHA-256 of the bundle's canonical content without its publication fields.

    Two bundles with the same fingerprint come from the same data, settings and software
    and hold the same results: publishing the second would add a version that differs only
    in its time stamp.
    """
    document = {k: v for k, v in document_of(bundle).items() if k not in PUBLICATION_FIELDS}
    return hashlib.sha256(canonical_bytes(document)).hexdigest()


def find_identical(store: BundleStore, bundle: Bundle) -> Bundle | None:
    """The newest published version of the bundle's name with the same fingerprint, if any.

    The one rule for "publish again?", used by the CLI and the service: an identical
    calibration is not published twice (the caller names the existing version instead).
    Damaged versions are skipped; they cannot be identical to anything.
    """
    target = calibration_fingerprint(bundle)
    for version in reversed(store.versions(bundle.name)):
        try:
            existing = store.get(bundle.name, version)
        except BundleIntegrityError:
            continue
        if calibration_fingerprint(existing) == target:
            return existing
    return None


def open_store(location: str | Path, *, prefix: str = "equitheta") -> BundleStore:
    """A store from a ``--store`` value: a directory path or a ``redis://`` URL.

    ``prefix`` is the Redis key prefix (the callers' settings decide it: the CLI from
    ``EQUITHETA_REDIS_PREFIX``, the service from its settings; both default to ``equitheta``).
    """
    text = str(location)
    if text.startswith(REDIS_SCHEMES):
        try:
            from calibration.bundle.redis_store import RedisStore
        except ImportError as exc:  # the redis client is an optional dependency
            raise BundleError("a redis:// store needs the 'redis' package (pip install equitheta[service])") from exc
        return RedisStore(text, prefix=prefix)
    from calibration.bundle.directory_store import DirectoryStore

    return DirectoryStore(text)
