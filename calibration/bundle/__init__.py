"""Calibration bundles: schema, canonical form and hash, verification, stores, scoring."""

from calibration.bundle.canonical import BundleError, BundleIntegrityError, from_bytes, seal, to_bytes
from calibration.bundle.directory_store import DirectoryStore
from calibration.bundle.schema import Bundle
from calibration.bundle.store import (
    BundleNotFound,
    BundleStore,
    InvalidReference,
    VersionConflict,
    open_store,
    parse_reference,
    resolve,
)

__all__ = [
    "Bundle",
    "BundleError",
    "BundleIntegrityError",
    "BundleNotFound",
    "BundleStore",
    "DirectoryStore",
    "InvalidReference",
    "VersionConflict",
    "from_bytes",
    "open_store",
    "parse_reference",
    "resolve",
    "seal",
    "to_bytes",
]
