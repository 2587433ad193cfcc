"""Canonical bytes, content hash and verification of bundles.

Canonical form: UTF-8 JSON with sorted keys, no insignificant white space, floats
in Python's shortest round-trip notation (``repr``), no NaN or infinity. The hash
is the SHA-256 of the canonical bytes of the bundle *without* its ``hash`` field;
the stored file is the canonical bytes *with* it, so the file can be re-verified.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

from pydantic import ValidationError

from calibration.bundle.schema import READABLE_SCHEMA_VERSIONS, Bundle, upgrade_document
from calibration.errors import BundleError, BundleIntegrityError

__all__ = ["BundleError", "BundleIntegrityError", "canonical_bytes", "content_hash", "from_bytes", "seal", "to_bytes"]


def canonical_bytes(document: dict[str, Any]) -> bytes:
    """The canonical bytes of a bundle document: what its SHA-256 is taken over."""
    return json.dumps(document, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode(
        "utf-8"
    )


def content_hash(document: dict[str, Any]) -> str:
    """SHA-256 (hex) of the canonical bytes of a document without its ``hash`` field."""
    body = {k: v for k, v in document.items() if k != "hash"}
    return hashlib.sha256(canonical_bytes(body)).hexdigest()


# Optional fields added after schema 2: left out of a document while empty, like the link section.
_LATER_POLICY_FIELDS = ("proposed_status", "guessing")
_LATER_ITEM_FIELDS = ("guessing", "guessing_se")
_LATER_IRT_DIF_FIELDS = (
    "reference_slope",
    "reference_intercepts",
    "focal_slope",
    "focal_intercepts",
    "reference_guessing",
    "focal_guessing",
)


def document_of(bundle: Bundle) -> dict[str, Any]:
    """The bundle as a JSON document; optional sections and fields added by later schema versions are left
    out when empty, so a document written by an earlier version is written back byte for byte (its hash
    still holds)."""
    document = bundle.model_dump(mode="json", exclude={"link"} if bundle.link is None else None)
    for item in document["items"]:
        _drop_empty(item, _LATER_ITEM_FIELDS)
        for cell in item["policy"].values():
            _drop_empty(cell, _LATER_POLICY_FIELDS)
    for row in (document.get("dif") or {}).get("irt", ()):
        _drop_empty(row, _LATER_IRT_DIF_FIELDS)
    for group in document["quality"]["by_group"].values():
        if not group.get("categories"):
            group.pop("categories", None)  # added in schema 4; absent when the test has no polytomous item
        _drop_empty(group, ("alpha_interval", "omega"))
    if not document["quality"].get("alpha_comparison"):
        document["quality"].pop("alpha_comparison", None)
    return document


def _drop_empty(entry: dict[str, Any], fields: tuple[str, ...]) -> None:
    for field in fields:
        if entry.get(field) is None:
            entry.pop(field, None)


def seal(bundle: Bundle, *, version: int | None = None) -> Bundle:
    """Return the bundle with ``version`` set (if given) and its hash computed."""
    document = document_of(bundle)
    if version is not None:
        document["version"] = version
    document["hash"] = content_hash(document)
    return Bundle.model_validate(document)


def to_bytes(bundle: Bundle) -> bytes:
    """The stored form: canonical JSON including the hash."""
    return canonical_bytes(document_of(bundle))


def from_bytes(data: bytes, *, source: str, location: str | None = None) -> Bundle:
    """Parse, verify the hash and validate; any failure is a :class:`BundleIntegrityError`."""
    try:
        document = json.loads(data.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise BundleIntegrityError(
            f"{source}: not UTF-8 text ({exc.reason} at byte {exc.start})", location=location
        ) from exc
    except json.JSONDecodeError as exc:
        raise BundleIntegrityError(
            f"{source}: not valid JSON at line {exc.lineno} column {exc.colno} "
            f"(the file is {len(data)} bytes; truncated or damaged?)",
            location=location,
        ) from exc
    return from_document(document, source=source, location=location)


def from_document(document: Any, *, source: str, location: str | None = None) -> Bundle:
    """Verify and validate an already-parsed bundle document."""
    if not isinstance(document, dict):
        raise BundleIntegrityError(
            f"{source}: a bundle is a JSON object, got {type(document).__name__}", location=location
        )
    stated = document.get("hash")
    if not isinstance(stated, str) or not stated:
        raise BundleIntegrityError(f"{source}: the bundle has no hash; it was never published", location=location)
    try:
        actual = content_hash(document)
    except (TypeError, ValueError) as exc:
        raise BundleIntegrityError(
            f"{source}: content cannot be put in canonical form: {exc}", location=location
        ) from exc
    if actual != stated:
        raise BundleIntegrityError(
            f"{source}: content hash mismatch (stated {stated[:12]}..., computed {actual[:12]}...); "
            "the file was changed after publication and is refused",
            location=location,
        )
    version = document.get("schema_version")
    if version not in READABLE_SCHEMA_VERSIONS:
        raise BundleIntegrityError(
            f"{source}: bundle schema version {version!r} is not one this software reads "
            f"({', '.join(READABLE_SCHEMA_VERSIONS)}); upgrade equitheta",
            location=location,
        )
    try:
        return Bundle.model_validate(upgrade_document(document))
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(p) for p in first["loc"])
        raise BundleIntegrityError(
            f"{source}: not a valid bundle: {where}: {first['msg']} ({exc.error_count()} problem(s))",
            location=location,
        ) from exc
