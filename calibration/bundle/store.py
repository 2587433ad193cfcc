"""Bundle stores: one contract, a directory implementation (the default, embedded).

Contract
--------
- ``publish(bundle)`` gives the bundle the next integer version of its name and
  stores it; ``put_version(bundle)`` stores a bundle at the version it carries and
  returns (stored bundle, created): same content again is accepted with ``created``
  False, other content is a :class:`VersionConflict`. ``created`` comes from the
  atomic write itself, so of concurrent identical writers exactly one sees True.
- A stored version never changes and is never half-visible.
- ``ping()`` says whether the store answers (without raising).
- ``events(stop)`` is the change feed: ``None`` each time it (re)subscribes, then one dict
  per published version or alias move, until ``stop`` is set; a store without a feed
  yields nothing. A lost connection raises :class:`StoreUnavailable`.
- Aliases (e.g. ``production``) point at versions, can be moved, and keep their
  history so they can be moved back.

Directory layout::

    STORE/NAME/v000001.json     canonical bytes, one file per version
    STORE/NAME/aliases.json     {"alias": {"version": 3, "history": [...]}}
    STORE/NAME/.lock            flock target serialising alias updates

File modes (before the umask): a version file is 0444 (it never changes), ``aliases.json``
0644. A temporary file left by a writer that was killed (``.incoming-*``, ``.aliases-*``)
is removed when a store is opened, once it is older than ``STALE_TEMP_SECONDS``.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
import tempfile
import threading
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Protocol

from calibration.bundle.canonical import canonical_bytes, from_bytes, seal, to_bytes
from calibration.bundle.schema import Bundle, valid_alias, valid_name
from calibration.errors import (
    BundleError,
    BundleIntegrityError,
    BundleNotFound,
    InvalidBundleDocument,
    InvalidReference,
    VersionConflict,
)
from calibration.io import current_umask

DEFAULT_ALIAS = "production"


@dataclass(frozen=True)
class AliasRecord:
    """Where an alias points now, and the versions it pointed at before (newest last)."""

    alias: str
    version: int
    history: tuple[tuple[int, str], ...]  # (version, moved_at) oldest first, current last


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

    def events(self, stop: threading.Event) -> Iterator[dict[str, Any] | None]:
        """Version and alias changes as they happen, until ``stop`` is set."""

    def aliases(self, name: str) -> dict[str, AliasRecord]:
        """Aliases of ``name`` with their versions and history."""

    def set_alias(self, name: str, alias: str, version: int) -> AliasRecord:
        """Point ``alias`` at a published ``version``."""

    def alias_back(self, name: str, alias: str) -> AliasRecord:
        """Move ``alias`` back to the version it pointed at before."""


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


# Fields that differ between two publications of the same calibration.
PUBLICATION_FIELDS = ("hash", "version", "created_at")


def calibration_fingerprint(bundle: Bundle) -> str:
    """SHA-256 of the bundle's canonical content without its publication fields.

    Two bundles with the same fingerprint come from the same data, settings and software
    and hold the same results: publishing the second would add a version that differs only
    in its time stamp.
    """
    document = {k: v for k, v in bundle.model_dump(mode="json").items() if k not in PUBLICATION_FIELDS}
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


def _now() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


# A writer's temporary file lives for milliseconds; one this old was left by a killed writer.
STALE_TEMP_SECONDS = 600
VERSION_FILE_MODE = 0o444
ALIAS_FILE_MODE = 0o644
TEMP_PREFIXES = (".incoming-", ".aliases-")


class DirectoryStore:
    """Bundles as files under a directory (see the module docstring for the layout)."""

    def __init__(self, root: Path | str) -> None:
        self.root = Path(root)
        self.removed_temp_files = self._remove_stale_temp_files()

    def _remove_stale_temp_files(self) -> int:
        """Delete temporary files that killed writers left behind; returns how many."""
        if not self.root.is_dir():
            return 0
        cutoff = datetime.now(UTC).timestamp() - STALE_TEMP_SECONDS
        removed = 0
        for directory in self.root.iterdir():
            if not directory.is_dir():
                continue
            for path in directory.iterdir():
                if path.name.startswith(TEMP_PREFIXES):
                    with contextlib.suppress(FileNotFoundError):
                        if path.stat().st_mtime < cutoff:
                            path.unlink()
                            removed += 1
        return removed

    def ping(self) -> bool:
        """Up when the directory exists, or can still be made by the first publish."""
        return self.root.is_dir() or (not self.root.exists() and self.root.parent.is_dir())

    def events(self, stop: threading.Event) -> Iterator[dict[str, Any] | None]:
        """The change feed: a directory store has none (every read looks at the files)."""
        return iter(())

    def __repr__(self) -> str:
        return f"DirectoryStore({str(self.root)!r})"

    def _dir(self, name: str) -> Path:
        if not valid_name(name):
            raise InvalidReference(f"bundle name {name!r} is not valid")
        return self.root / name

    @staticmethod
    def _file(directory: Path, version: int) -> Path:
        return directory / f"v{version:06d}.json"

    def names(self) -> list[str]:
        """Every bundle name, sorted."""
        if not self.root.is_dir():
            return []
        return sorted(
            p.name for p in self.root.iterdir() if p.is_dir() and valid_name(p.name) and self.versions(p.name)
        )

    def versions(self, name: str) -> list[int]:
        """Published versions of ``name``, ascending."""
        directory = self._dir(name)
        if not directory.is_dir():
            return []
        found = []
        for p in directory.glob("v*.json"):
            stem = p.stem[1:]
            if stem.isdigit():
                found.append(int(stem))
        return sorted(found)

    def get(self, name: str, version: int) -> Bundle:
        """One published version, verified against its hash."""
        path = self._file(self._dir(name), version)
        try:
            data = path.read_bytes()
        except FileNotFoundError:
            have = self.versions(name)
            if not have:
                raise BundleNotFound(f"no bundle named {name!r}") from None
            raise BundleNotFound(
                f"bundle {name!r} has no version {version} (versions: {', '.join(map(str, have))})"
            ) from None
        bundle = from_bytes(data, source=f"{name}@{version}", location=str(path))
        if bundle.name != name or bundle.version != version:
            raise BundleIntegrityError(
                f"{name}@{version}: the file holds {bundle.name}@{bundle.version}; it was moved", location=str(path)
            )
        return bundle

    def publish(self, bundle: Bundle) -> Bundle:
        """Publish as the next version of the bundle's name (the document's version is ignored)."""
        directory = self._dir(bundle.name)
        directory.mkdir(parents=True, exist_ok=True)
        # Retry if another writer takes the version we chose between listing and linking.
        for _ in range(100):
            versions = self.versions(bundle.name)
            sealed = seal(bundle, version=(versions[-1] + 1) if versions else 1)
            try:
                self._write_new(directory, sealed)
                return sealed
            except FileExistsError:
                continue
        raise BundleError(f"could not find a free version for {bundle.name!r} after 100 attempts")

    def put_version(self, bundle: Bundle) -> tuple[Bundle, bool]:
        """Publish at the document's version: ``(stored, True)`` if new, ``(existing, False)`` if identical."""
        directory = self._dir(bundle.name)
        sealed = check_placed_version(bundle)
        directory.mkdir(parents=True, exist_ok=True)
        try:
            self._write_new(directory, sealed)
        except FileExistsError:
            return same_or_conflict(self.get(bundle.name, bundle.version), sealed), False
        return sealed, True

    @staticmethod
    def _write_new(directory: Path, bundle: Bundle) -> None:
        """Write to a temporary file, fsync, then hard-link into place: never overwrites."""
        target = DirectoryStore._file(directory, bundle.version)
        fd, tmp = tempfile.mkstemp(prefix=".incoming-", suffix=".json", dir=directory)
        try:
            with os.fdopen(fd, "wb") as handle:
                handle.write(to_bytes(bundle))
                handle.flush()
                os.fsync(handle.fileno())
            os.chmod(tmp, VERSION_FILE_MODE & ~current_umask())
            os.link(tmp, target)  # fails with FileExistsError if the version exists
        finally:
            os.unlink(tmp)
        _fsync_dir(directory)

    @contextlib.contextmanager
    def _locked(self, name: str) -> Iterator[Path]:
        directory = self._dir(name)
        directory.mkdir(parents=True, exist_ok=True)
        with open(directory / ".lock", "a+") as lock:
            fcntl.flock(lock, fcntl.LOCK_EX)
            try:
                yield directory
            finally:
                fcntl.flock(lock, fcntl.LOCK_UN)

    def _read_aliases(self, directory: Path) -> dict[str, dict[str, object]]:
        path = directory / "aliases.json"
        if not path.exists():
            return {}
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except json.JSONDecodeError as exc:
            raise BundleIntegrityError(f"{directory.name}: damaged alias file ({exc})", location=str(path)) from exc
        if not isinstance(data, dict):
            raise BundleIntegrityError(f"{directory.name}: damaged alias file (not an object)", location=str(path))
        return data

    def aliases(self, name: str) -> dict[str, AliasRecord]:
        """Aliases of ``name`` with their versions and history."""
        directory = self._dir(name)
        return {
            alias: AliasRecord(
                alias=alias,
                version=int(entry["version"]),  # type: ignore[call-overload]
                history=tuple((int(v), str(t)) for v, t in entry.get("history", [])),  # type: ignore[union-attr]
            )
            for alias, entry in self._read_aliases(directory).items()
        }

    def set_alias(self, name: str, alias: str, version: int) -> AliasRecord:
        """Point ``alias`` at ``version`` (a published version), keeping the previous target in its history."""
        if not valid_alias(alias):
            raise InvalidReference(f"alias {alias!r} is not valid: a lower-case letter, then letters, digits, _ or -")
        self.get(name, version)  # the target must exist and verify
        with self._locked(name) as directory:
            data = self._read_aliases(directory)
            entry = data.get(alias, {"version": version, "history": []})
            history = list(entry.get("history", []))  # type: ignore[call-overload]
            history.append([version, _now()])
            data[alias] = {"version": version, "history": history}
            self._write_aliases(directory, data)
        return self.aliases(name)[alias]

    def alias_back(self, name: str, alias: str) -> AliasRecord:
        """Point the alias at the version it pointed to before its last move."""
        with self._locked(name) as directory:
            data = self._read_aliases(directory)
            if alias not in data:
                raise BundleNotFound(f"bundle {name!r} has no alias {alias!r}")
            history = list(data[alias].get("history", []))  # type: ignore[union-attr]
            if len(history) < 2:
                raise BundleError(f"alias {alias!r} of {name!r} has no earlier version to move back to")
            previous = int(history[-2][0])
            history.append([previous, _now()])
            data[alias] = {"version": previous, "history": history}
            self._write_aliases(directory, data)
        return self.aliases(name)[alias]

    @staticmethod
    def _write_aliases(directory: Path, data: dict[str, dict[str, object]]) -> None:
        fd, tmp = tempfile.mkstemp(prefix=".aliases-", suffix=".json", dir=directory)
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as handle:
                json.dump(data, handle, sort_keys=True, indent=1)
                handle.flush()
                os.fsync(handle.fileno())
            os.chmod(tmp, ALIAS_FILE_MODE & ~current_umask())
            os.replace(tmp, directory / "aliases.json")
        except BaseException:
            if os.path.exists(tmp):
                os.unlink(tmp)
            raise
        _fsync_dir(directory)


def _fsync_dir(directory: Path) -> None:
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def open_store(location: str | Path, *, prefix: str = "equitheta") -> BundleStore:
    """A store from a ``--store`` value: a directory path or a ``redis://`` URL.

    ``prefix`` is the Redis key prefix (the callers' settings decide it: the CLI from
    ``EQUITHETA_REDIS_PREFIX``, the service from its settings; both default to ``equitheta``).
    """
    text = str(location)
    if text.startswith(("redis://", "rediss://", "unix://")):
        try:
            from calibration.bundle.redis_store import RedisStore
        except ImportError as exc:  # the redis client is an optional dependency
            raise BundleError("a redis:// store needs the 'redis' package (pip install equitheta[service])") from exc
        return RedisStore(text, prefix=prefix)
    return DirectoryStore(text)
