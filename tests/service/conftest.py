"""Service fixtures: the example bundle, a live uvicorn, real Redis (shared and private)."""

from __future__ import annotations

import os
import subprocess
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
import redis

from calibration.bundle import DirectoryStore
from service.settings import Settings
from tests.helpers import (
    SHARED_REDIS,
    example_bundle,
    example_keys,
    redis_answers,
    start_private_redis,
    stop_process,
)


@pytest.fixture
def example_store(tmp_path: Path) -> Path:
    store = tmp_path / "store"
    DirectoryStore(store).put_version(example_bundle())
    return store


@pytest.fixture
def keyed_settings(example_store: Path) -> Settings:
    return Settings(store=str(example_store), api_keys=example_keys(), log_level="warning")


@pytest.fixture
def shared_redis() -> Iterator[tuple[str, str]]:
    """The machine's Redis on 127.0.0.1:6379 with a key prefix of this test's own; cleaned afterwards."""
    if not redis_answers(SHARED_REDIS):
        if os.environ.get("EQUITHETA_REQUIRE_REDIS") == "1":
            pytest.fail("EQUITHETA_REQUIRE_REDIS=1 but no Redis answers on 127.0.0.1:6379")
        pytest.skip("no Redis on 127.0.0.1:6379")
    prefix = f"equitheta-test-{uuid.uuid4().hex[:12]}"
    yield SHARED_REDIS, prefix
    client = redis.Redis.from_url(SHARED_REDIS)
    for key in client.scan_iter(f"{prefix}:*"):
        client.delete(key)


@pytest.fixture
def private_redis(tmp_path: Path) -> Iterator[tuple[str, subprocess.Popen[bytes]]]:
    """A redis-server of this test's own on a free port (tests that stop Redis use this one)."""
    url, process = start_private_redis(tmp_path)
    yield url, process
    stop_process(process)
