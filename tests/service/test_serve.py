"""`python -m service` (what `equitheta serve` execs) runs uvicorn over a store and refuses bad settings."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import httpx

from tests.helpers import free_port


def test_serve_runs_uvicorn_over_a_directory_store(example_store: Path) -> None:
    port = free_port()
    command = [sys.executable, "-m", "service", "--store", str(example_store), "--port", str(port)]
    process = subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        deadline = time.time() + 30
        while True:
            try:
                ready = httpx.get(f"http://127.0.0.1:{port}/readyz")
                break
            except httpx.HTTPError:
                assert time.time() < deadline and process.poll() is None, "the service did not start"
                time.sleep(0.1)
        assert ready.json() == {
            "status": "ready",
            "store": "reachable",
            "bundles_loaded": 1,
            "detail": None,
            "damaged_versions": [],
        }
    finally:
        process.terminate()
        _, err = process.communicate(timeout=10)
    assert "no API keys configured: open access, bound to loopback only" in err


def test_serve_refuses_an_open_public_bind(example_store: Path) -> None:
    done = subprocess.run(
        [sys.executable, "-m", "service", "--store", str(example_store), "--host", "0.0.0.0"],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert done.returncode == 2
    assert "EQUITHETA_HOST=0.0.0.0 with no API keys configured" in done.stderr
