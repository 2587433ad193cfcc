"""The directory store (the default, embedded): one file per version, written atomically.

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
import json
import os
import tempfile
import threading
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

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
)
from calibration.io import current_umask

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

    def change_token(self, name: str) -> tuple[int, tuple[int, int, int] | None] | None:
        """A value that changes whenever a version of ``name`` is published or an alias moves (two stats).

        Publishing renames a version file into the name's directory and moving an alias replaces
        ``aliases.json``, so the directory's modification time and the alias file's inode, time and
        size together change with every write. None when the name has no directory.
        """
        try:
            directory = self._dir(name).stat()
        except OSError:
            return None
        try:
            alias = (self._dir(name) / "aliases.json").stat()
            alias_key: tuple[int, int, int] | None = (alias.st_ino, alias.st_mtime_ns, alias.st_size)
        except OSError:
            alias_key = None
        return directory.st_mtime_ns, alias_key

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
        """Aliases of ``name`` with their versions and history (each move: version, time, who)."""
        directory = self._dir(name)
        return {
            alias: AliasRecord(
                alias=alias,
                version=int(entry["version"]),  # type: ignore[call-overload]
                history=tuple(
                    AliasMove(int(move[0]), str(move[1]), str(move[2]) if len(move) > 2 else UNKNOWN_MOVER)
                    for move in entry.get("history", [])  # type: ignore[union-attr]
                ),
            )
            for alias, entry in self._read_aliases(directory).items()
        }

    def set_alias(self, name: str, alias: str, version: int, *, by: str = UNKNOWN_MOVER) -> AliasRecord:
        """Point ``alias`` at ``version`` (a published version), keeping the previous target in its history."""
        if not valid_alias(alias):
            raise InvalidReference(f"alias {alias!r} is not valid: a lower-case letter, then letters, digits, _ or -")
        self.get(name, version)  # the target must exist and verify
        with self._locked(name) as directory:
            data = self._read_aliases(directory)
            entry = data.get(alias, {"version": version, "history": []})
            history = list(entry.get("history", []))  # type: ignore[call-overload]
            history.append([version, now_utc(), mover_text(by)])
            data[alias] = {"version": version, "history": history}
            self._write_aliases(directory, data)
        return self.aliases(name)[alias]

    def alias_back(self, name: str, alias: str, *, by: str = UNKNOWN_MOVER) -> AliasRecord:
        """Point the alias at the version it pointed to before its last move."""
        with self._locked(name) as directory:
            data = self._read_aliases(directory)
            if alias not in data:
                raise BundleNotFound(f"bundle {name!r} has no alias {alias!r}")
            history = list(data[alias].get("history", []))  # type: ignore[union-attr]
            if len(history) < 2:
                raise BundleError(f"alias {alias!r} of {name!r} has no earlier version to move back to")
            previous = int(history[-2][0])
            history.append([previous, now_utc(), mover_text(by)])
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
