"""API keys: stored as SHA-256 hashes, checked in constant time, never logged; scopes per key.

Key file (``EQUITHETA_API_KEYS_FILE``), JSON::

    [{"name": "intake-form", "scopes": ["score"], "sha256": "<hex of sha256(key)>"}]

Inline (``EQUITHETA_API_KEYS``): ``name:scope+scope:sha256hex`` entries separated by ``;``.
Clients send ``Authorization: Bearer <key>`` (or ``X-API-Key: <key>``). With no keys
configured every request is allowed, and the settings only let the service bind
to loopback. ``python -m service.security new NAME score,read`` makes a key.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import secrets
import sys
from dataclasses import dataclass
from pathlib import Path

from calibration.vocabulary import SCOPES
from service.errors import Forbidden, Unauthorized


@dataclass(frozen=True)
class Principal:
    """An authenticated caller: its name and scopes."""

    name: str
    scopes: frozenset[str]


OPEN_ACCESS = Principal("open-access (no API keys configured)", frozenset(SCOPES))


@dataclass(frozen=True)
class KeyRecord:
    """One configured key: its name, the SHA-256 of the key, its scopes."""

    name: str
    scopes: frozenset[str]
    digest: bytes


def key_digest(key: str) -> str:
    """SHA-256 (hex) of an API key: what the key file stores instead of the key."""
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def _record(name: str, scopes: list[str], digest: str, where: str) -> KeyRecord:
    unknown = sorted(set(scopes) - set(SCOPES))
    if unknown:
        raise ValueError(f"{where}: key {name!r} has unknown scopes {unknown} (known: {', '.join(SCOPES)})")
    if len(digest) != 64 or any(c not in "0123456789abcdef" for c in digest.lower()):
        raise ValueError(f"{where}: key {name!r} needs the 64-hex-digit SHA-256 of the key, not the key itself")
    return KeyRecord(name, frozenset(scopes), bytes.fromhex(digest))


def load_keys(path: Path | None, inline: str) -> list[KeyRecord]:
    """Key records from a key file and/or an inline setting (unknown scopes refused, naming the key)."""
    records: list[KeyRecord] = []
    if path is not None:
        try:
            entries = json.loads(path.read_text(encoding="utf-8"))
        except json.JSONDecodeError as exc:
            raise ValueError(f"EQUITHETA_API_KEYS_FILE {path}: not JSON ({exc})") from exc
        for i, entry in enumerate(entries):
            where = f"EQUITHETA_API_KEYS_FILE entry {i + 1}"
            if not isinstance(entry, dict) or not {"name", "scopes", "sha256"} <= set(entry):
                raise ValueError(f"{where}: needs name, scopes and sha256")
            records.append(_record(str(entry["name"]), list(entry["scopes"]), str(entry["sha256"]), where))
    for i, chunk in enumerate(c for c in inline.split(";") if c.strip()):
        parts = chunk.strip().split(":")
        if len(parts) != 3:
            raise ValueError(f"EQUITHETA_API_KEYS entry {i + 1}: expected name:scope+scope:sha256hex")
        records.append(_record(parts[0], parts[1].split("+"), parts[2], f"EQUITHETA_API_KEYS entry {i + 1}"))
    return records


class KeyRing:
    """The configured keys: authenticates a request's key in constant time."""

    def __init__(self, records: list[KeyRecord]) -> None:
        self.records = records

    @property
    def open(self) -> bool:
        """Whether no key is configured (open access, loopback only)."""
        return not self.records

    def authenticate(self, authorization: str | None, api_key: str | None) -> Principal:
        """The principal of a request's key (401 without one or with an unknown one)."""
        if self.open:
            return OPEN_ACCESS
        presented = api_key
        if authorization and authorization.lower().startswith("bearer "):
            presented = authorization[7:].strip()
        if not presented:
            raise Unauthorized("send an API key as 'Authorization: Bearer <key>' or 'X-API-Key: <key>'")
        digest = hashlib.sha256(presented.encode("utf-8")).digest()
        match = None
        for record in self.records:  # compare with every record: constant time whatever matches
            if hmac.compare_digest(record.digest, digest):
                match = record
        if match is None:
            raise Unauthorized("the API key is not known")
        return Principal(match.name, match.scopes)

    @staticmethod
    def require(principal: Principal, scope: str) -> None:
        """Refuse (403) a principal without ``scope``."""
        if scope not in principal.scopes:
            raise Forbidden(
                f"key {principal.name!r} lacks the {scope!r} scope this route needs "
                f"(it has: {', '.join(sorted(principal.scopes)) or 'none'})"
            )


def main(argv: list[str]) -> int:
    """``python -m service.security NAME SCOPE...``: print a new key and the record to store for it."""
    if len(argv) != 3 or argv[0] != "new":
        print("usage: python -m service.security new NAME score,read,publish", file=sys.stderr)
        return 2
    key = secrets.token_urlsafe(32)
    scopes = argv[2].split(",")
    print(f"key (give it to the client once; it is not stored): {key}")
    print(json.dumps({"name": argv[1], "scopes": scopes, "sha256": key_digest(key)}))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
