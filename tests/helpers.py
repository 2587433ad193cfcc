"""Helpers shared by the tests and the drills (plain functions; the fixtures live in the conftest files).

Reference data files sit in ``tests/data`` with their sources; the service helpers build the example
bundle's keys, serve an app with a live uvicorn and start private Redis servers.
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import socket
import subprocess
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import pytest

from calibration.bundle import Bundle
from calibration.irt.simulate import simulate_responses

__all__ = ["simulate_responses"]  # the library's generator, for the simulations in the tests

if TYPE_CHECKING:
    from fastapi import FastAPI

DATA = Path(__file__).parent / "data"


def load_reference(name: str) -> dict:
    return json.loads((DATA / name).read_text())


EXAMPLES = Path(__file__).parents[1] / "openapi_examples"


CASES = json.loads((EXAMPLES / "cases.json").read_text())


SHARED_REDIS = "redis://127.0.0.1:6379/0"


def example_bundle() -> Bundle:
    return Bundle.model_validate_json((EXAMPLES / "bundle.json").read_text())


def example_keys() -> str:
    from service.security import key_digest

    entries = (f"{name}:{'+'.join(CASES['scopes'][name])}:{key_digest(key)}" for name, key in CASES["keys"].items())
    return ";".join(entries)


def auth(role: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {CASES['keys'][role]}"}


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@contextlib.contextmanager
def live_server(app: FastAPI) -> Iterator[str]:
    """Serve ``app`` with uvicorn on a free loopback port in a thread; yields the base URL."""
    port = free_port()
    import uvicorn

    server = uvicorn.Server(uvicorn.Config(app, host="127.0.0.1", port=port, log_level="warning"))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.time() + 15
    while not server.started:
        if time.time() > deadline or not thread.is_alive():
            raise RuntimeError("uvicorn did not start")
        time.sleep(0.02)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(10)


def redis_answers(url: str) -> bool:
    import redis

    try:
        return bool(redis.Redis.from_url(url, socket_connect_timeout=1).ping())
    except redis.RedisError:
        return False


def start_private_redis(
    directory: Path, *, password: str | None = None, port: int | None = None
) -> tuple[str, subprocess.Popen[bytes]]:
    """A redis-server of a test's own (on a free port unless given); returns its URL and process."""
    binary = shutil.which("redis-server")
    if binary is None:
        if os.environ.get("EQUITHETA_REQUIRE_REDIS") == "1":
            pytest.fail("EQUITHETA_REQUIRE_REDIS=1 but redis-server is not installed")
        pytest.skip("redis-server is not installed")
    port = port or free_port()
    command = [
        binary,
        "--port",
        str(port),
        "--bind",
        "127.0.0.1",
        "--save",
        "",
        "--appendonly",
        "no",
        "--dir",
        str(directory),
    ]
    if password:
        command += ["--requirepass", password]
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    url = f"redis://:{password}@127.0.0.1:{port}/0" if password else f"redis://127.0.0.1:{port}/0"
    deadline = time.time() + 10
    while not redis_answers(url):
        if time.time() > deadline:
            process.kill()
            raise RuntimeError("private redis-server did not start")
        time.sleep(0.05)
    return url, process


def stop_process(process: subprocess.Popen[bytes]) -> None:
    if process.poll() is None:
        with contextlib.suppress(ProcessLookupError):
            os.kill(process.pid, 18)  # SIGCONT, in case a test stalled it
        process.terminate()
        process.wait(10)


def poll(condition: Callable[[], bool], *, timeout: float = 15.0) -> bool:
    """True once ``condition()`` holds, False after ``timeout`` seconds (a bounded wait, not a timing check)."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(0.05)
    return condition()


def metric_value(text: str, sample: str, **labels: str) -> float:
    """A sample's value in a Prometheus text exposition (parsed by the client library's own parser)."""
    from prometheus_client.parser import text_string_to_metric_families

    for family in text_string_to_metric_families(text):
        for s in family.samples:
            if s.name == sample and all(s.labels.get(k) == v for k, v in labels.items()):
                return float(s.value)
    raise AssertionError(f"no sample {sample} {labels} in the metrics")


ARTIFACTS = Path(__file__).parents[1] / "test-artifacts"
"""Screenshots and pages the browser tests leave for a person to look at (not committed)."""


@contextlib.contextmanager
def headless_chromium() -> Iterator[object]:
    """Debian's chromium driven by its own chromedriver (selenium; no download, no network).

    Skips when either is missing, unless EQUITHETA_REQUIRE_BROWSER=1 (CI), which fails instead.
    """
    chromium, driver_path = shutil.which("chromium"), shutil.which("chromedriver")
    if chromium is None or driver_path is None:
        if os.environ.get("EQUITHETA_REQUIRE_BROWSER") == "1":
            pytest.fail("EQUITHETA_REQUIRE_BROWSER=1 but Debian's chromium or chromedriver is not installed")
        pytest.skip("no chromium/chromedriver (scripts/test installs them where it can)")
    os.environ.setdefault("SE_OFFLINE", "true")  # never let selenium look for a driver on the network
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = chromium
    for flag in (
        "--headless=new",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-dev-shm-usage",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        "--window-size=1280,1800",
    ):
        options.add_argument(flag)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(driver_path), options=options)
    try:
        yield driver
    finally:
        driver.quit()
