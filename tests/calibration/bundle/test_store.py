"""Bundles: canonical hash, verification on load, immutable versions, aliases, concurrency."""

from __future__ import annotations

import json
import multiprocessing
from pathlib import Path

import pytest

from calibration.bundle import (
    BundleIntegrityError,
    BundleNotFound,
    DirectoryStore,
    InvalidReference,
    VersionConflict,
    from_bytes,
    resolve,
    seal,
    to_bytes,
)
from calibration.bundle.canonical import content_hash
from calibration.bundle.schema import Bundle

SCHEMA_FILE = Path(__file__).parents[3] / "calibration" / "bundle" / "bundle.schema.json"


def test_hash_is_sha256_of_canonical_bytes_without_hash(lsat6_bundle: Bundle) -> None:
    import hashlib

    sealed = seal(lsat6_bundle, version=1)
    document = json.loads(to_bytes(sealed))
    body = {k: v for k, v in document.items() if k != "hash"}
    # Independent route: hashlib over json.dumps with the documented canonical options.
    expected = hashlib.sha256(
        json.dumps(body, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()
    ).hexdigest()
    assert sealed.hash == expected == content_hash(document)
    assert from_bytes(to_bytes(sealed), source="t") == sealed


def test_tampered_truncated_and_unsealed_files_are_refused(lsat6_bundle: Bundle) -> None:
    sealed = seal(lsat6_bundle, version=1)
    data = to_bytes(sealed)
    tampered = data.replace(b'"slope":0.8', b'"slope":0.9', 1)
    assert tampered != data
    with pytest.raises(BundleIntegrityError, match="content hash mismatch"):
        from_bytes(tampered, source="t")
    with pytest.raises(BundleIntegrityError, match="not valid JSON .*truncated or damaged"):
        from_bytes(data[: len(data) // 2], source="t")
    with pytest.raises(BundleIntegrityError, match="never published"):
        from_bytes(to_bytes(lsat6_bundle), source="t")


def test_publish_assigns_versions_and_never_overwrites(tmp_path: Path, lsat6_bundle: Bundle) -> None:
    store = DirectoryStore(tmp_path)
    one = store.publish(lsat6_bundle)
    two = store.publish(lsat6_bundle)
    assert (one.version, two.version) == (1, 2)
    assert store.versions("lsat6") == [1, 2]
    assert store.get("lsat6", 1) == one
    # Same content at the same version is accepted (idempotent); other content is a conflict.
    assert store.put_version(one) == (one, False)
    other = seal(lsat6_bundle.model_copy(update={"created_at": "2020-01-01T00:00:00Z"}), version=1)
    with pytest.raises(VersionConflict, match="already published with other content"):
        store.put_version(other)
    assert store.get("lsat6", 1).hash == one.hash
    # No temporary files are left behind.
    assert sorted(p.name for p in (tmp_path / "lsat6").iterdir() if p.name.startswith(".incoming")) == []


def test_damaged_file_in_store_is_refused_with_its_path(tmp_path: Path, lsat6_bundle: Bundle) -> None:
    store = DirectoryStore(tmp_path)
    store.publish(lsat6_bundle)
    path = tmp_path / "lsat6" / "v000001.json"
    path.chmod(0o644)
    path.write_bytes(path.read_bytes()[:-40])
    with pytest.raises(BundleIntegrityError, match=r"lsat6@1: not valid JSON") as caught:
        store.get("lsat6", 1)
    # The message names the version; where it lies is for operators and the CLI, not for API answers.
    assert "v000001.json" not in str(caught.value) and str(caught.value.location).endswith("lsat6/v000001.json")


def test_aliases_move_and_move_back(tmp_path: Path, lsat6_bundle: Bundle) -> None:
    store = DirectoryStore(tmp_path)
    for _ in range(3):
        store.publish(lsat6_bundle)
    assert resolve(store, "lsat6").version == 3  # no production alias: the newest
    store.set_alias("lsat6", "production", 2)
    assert resolve(store, "lsat6").version == 2  # bare name follows production
    store.set_alias("lsat6", "production", 3)
    assert resolve(store, "lsat6@production").version == 3
    assert store.alias_back("lsat6", "production").version == 2
    assert resolve(store, "lsat6@1").version == 1
    with pytest.raises(BundleNotFound, match="no version 9 .*versions: 1, 2, 3"):
        resolve(store, "lsat6@9")
    with pytest.raises(BundleNotFound, match="no alias 'staging'"):
        resolve(store, "lsat6@staging")
    with pytest.raises(BundleNotFound, match="no bundle named 'other'"):
        resolve(store, "other")
    with pytest.raises(InvalidReference):
        resolve(store, "Bad Name")
    with pytest.raises(BundleNotFound):
        store.set_alias("lsat6", "production", 7)


def test_every_alias_move_records_when_and_who(tmp_path: Path, lsat6_bundle: Bundle) -> None:
    store = DirectoryStore(tmp_path)
    store.publish(lsat6_bundle)
    store.publish(lsat6_bundle)
    store.set_alias("lsat6", "production", 1, by="API key release-bot")
    store.set_alias("lsat6", "production", 2, by="command line (ana)\n")
    store.alias_back("lsat6", "production", by="API key release-bot")
    moves = store.aliases("lsat6")["production"].history
    assert [(m.version, m.by) for m in moves] == [
        (1, "API key release-bot"),
        (2, "command line (ana)"),  # one line
        (1, "API key release-bot"),
    ]
    assert all(len(m.moved_at) == 20 and m.moved_at.endswith("Z") for m in moves)
    # aliases.json written before the mover was kept: [version, time] pairs read as by an unknown mover.
    path = tmp_path / "lsat6" / "aliases.json"
    path.write_text(json.dumps({"staging": {"version": 1, "history": [[1, "2026-11-30T00:00:00Z"]]}}))
    assert store.aliases("lsat6")["staging"].history[0].by == "unknown"


def _publish_in_process(root: str, document: bytes, queue: multiprocessing.Queue) -> None:  # type: ignore[type-arg]
    bundle = Bundle.model_validate_json(document)
    try:
        queue.put(("ok", DirectoryStore(root).put_version(bundle)[0].hash))
    except VersionConflict:
        queue.put(("conflict", ""))


def test_concurrent_publishes_of_one_version_exactly_one_wins(tmp_path: Path, lsat6_bundle: Bundle) -> None:
    # Eight processes race to publish version 1 with eight different contents.
    ctx = multiprocessing.get_context("fork")
    queue = ctx.Queue()
    docs = [
        seal(lsat6_bundle.model_copy(update={"created_at": f"2026-01-0{i + 1}T00:00:00Z"}), version=1) for i in range(8)
    ]
    procs = [
        ctx.Process(target=_publish_in_process, args=(str(tmp_path), d.model_dump_json().encode(), queue)) for d in docs
    ]
    for p in procs:
        p.start()
    for p in procs:
        p.join(30)
    results = [queue.get(timeout=5) for _ in procs]
    winners = [h for status, h in results if status == "ok"]
    assert len(winners) == 1
    assert DirectoryStore(tmp_path).get("lsat6", 1).hash == winners[0]


def test_exported_json_schema_is_current() -> None:
    # The checked-in schema file is what other tools read; it must match the code.
    assert json.loads(SCHEMA_FILE.read_text()) == Bundle.model_json_schema()


def test_a_schema_2_document_is_written_back_byte_for_byte(tmp_path: Path) -> None:
    # tests/data/bundle_schema_v2.json: the service's example bundle as equitheta wrote it under schema
    # version 2 (invented data), before the optional link section existed. Read by this code and put into
    # another store (as Redis re-seeding and store copies do), its bytes and hash must not change, or the
    # stated hash would no longer verify.
    from calibration.bundle import from_bytes, to_bytes
    from calibration.bundle.canonical import canonical_bytes

    raw = (Path(__file__).parents[2] / "data" / "bundle_schema_v2.json").read_bytes()
    bundle = from_bytes(raw, source="bundle_schema_v2.json")
    assert bundle.schema_version == "2" and bundle.link is None
    assert to_bytes(bundle) == canonical_bytes(json.loads(raw))
    copy, created = DirectoryStore(tmp_path).put_version(bundle)
    assert created and copy.hash == bundle.hash
    assert DirectoryStore(tmp_path).get(bundle.name, bundle.version) == bundle
