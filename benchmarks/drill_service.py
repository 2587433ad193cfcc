"""Fault and abuse drills against a live service on loopback (the long versions of the suite's tests).

Every drill is bounded in time and requests and talks only to 127.0.0.1:

1. ``schemathesis``: every check in every auth mode (no key, read, score, publish), run through
   the suite's test with many more cases; prints how many cases ran and how many failed.
2. ``redis``: a private redis-server behind ``equitheta serve --workers 2``; default-route score
   requests from 4 client threads for 30 s while Redis is stalled (SIGSTOP) for 10 s, then killed
   and restarted empty. Prints failed requests and p50/p99 latency per phase.
3. ``soak``: 60 s of score requests from 4 client threads with both cores also kept busy by two
   spinning processes; prints errors, p50/p99, worker restarts (uvicorn's "died" lines) and the
   workers' RSS growth.

Run: ``.venv/bin/python -m benchmarks.drill_service [schemathesis|redis|soak ...]`` (default: all).
"""

from __future__ import annotations

import os
import resource
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import httpx
import numpy as np

from benchmarks.common import machine
from calibration.bundle.redis_store import RedisStore
from tests.helpers import CASES, auth, example_bundle, example_keys, free_port, start_private_redis

ROOT = Path(__file__).resolve().parents[1]
SCORE = {"responses": [{"id": "a", "group": "tablet", "answers": {"T1": 1, "T2": 0, "T3": 1, "T5": 1}}]}
CLIENT_THREADS = 4


def _server_log(process: subprocess.Popen[str]) -> str:
    return Path(process.log_path).read_text()  # type: ignore[attr-defined]


def _serve(store: str, port: int, *, workers: int = 2) -> subprocess.Popen[str]:
    env = {**os.environ, "EQUITHETA_API_KEYS": example_keys(), "EQUITHETA_LOG_LEVEL": "info"}
    command = [sys.executable, "-m", "service", "--store", store, "--port", str(port), "--workers", str(workers)]
    # The server's log goes to a file: a pipe nobody reads fills up and then blocks the server's logging.
    log = tempfile.NamedTemporaryFile(prefix="equitheta-drill-", suffix=".log", delete=False)  # noqa: SIM115
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=log, text=True, env=env)
    process.log_path = log.name  # type: ignore[attr-defined]
    base = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"{base}/healthz").status_code == 200:
                return process
        except httpx.HTTPError:
            time.sleep(0.1)
    process.kill()
    raise RuntimeError("the service did not start")


class Load:
    """Client threads sending default-route score requests; records (time, status, latency)."""

    def __init__(self, base: str) -> None:
        self.url = f"{base}/v1/bundles/pantry-checkout/scores"
        self.records: list[tuple[float, int, float]] = []
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._threads = [threading.Thread(target=self._run, daemon=True) for _ in range(CLIENT_THREADS)]
        self.started = time.monotonic()

    def _run(self) -> None:
        with httpx.Client(headers=auth("scorer"), timeout=30) as client:
            while not self._stop.is_set():
                start = time.monotonic()
                try:
                    status = client.post(self.url, json=SCORE).status_code
                except httpx.HTTPError:
                    status = 0
                with self._lock:
                    self.records.append((start - self.started, status, time.monotonic() - start))

    def __enter__(self) -> Load:
        for thread in self._threads:
            thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        for thread in self._threads:
            thread.join(30)

    def summary(self, begin: float = 0.0, end: float = float("inf")) -> str:
        window = [(s, lat) for t, s, lat in self.records if begin <= t < end]
        if not window:
            return "no requests"
        latency = np.array([lat for _, lat in window]) * 1000
        failed = sum(1 for s, _ in window if s != 200)
        return (
            f"{len(window)} requests, {failed} failed, p50 {np.percentile(latency, 50):.1f} ms, "
            f"p99 {np.percentile(latency, 99):.1f} ms"
        )


def drill_schemathesis(examples: int = 40) -> None:
    log = Path(tempfile.mkdtemp()) / "cases.log"
    env = {**os.environ, "EQUITHETA_SCHEMATHESIS_EXAMPLES": str(examples), "EQUITHETA_SCHEMATHESIS_LOG": str(log)}
    start = time.perf_counter()
    done = subprocess.run(
        [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "tests/service/test_schemathesis.py"],
        cwd=ROOT,
        env=env,
        capture_output=True,
        text=True,
    )
    cases = log.read_text().splitlines() if log.exists() else []
    modes = {line.split("\t")[0] for line in cases}
    print(
        f"schemathesis: {len(cases)} cases in {len(modes)} auth modes ({', '.join(sorted(modes))}), every check; "
        f"pytest: {done.stdout.strip().splitlines()[-1]}; {time.perf_counter() - start:.0f} s wall"
    )


def drill_redis() -> None:
    directory = Path(tempfile.mkdtemp())
    url, redis_process = start_private_redis(directory)
    port_text = url.rsplit(":", 1)[1].split("/")[0]
    store = RedisStore(url)
    store.put_version(example_bundle())
    store.set_alias("pantry-checkout", "production", 1)
    port = free_port()
    server = _serve(url, port)
    try:
        with Load(f"http://127.0.0.1:{port}") as load:
            time.sleep(5)
            os.kill(redis_process.pid, signal.SIGSTOP)
            stall_start = time.monotonic() - load.started
            time.sleep(10)
            os.kill(redis_process.pid, signal.SIGCONT)
            stall_end = time.monotonic() - load.started
            time.sleep(5)
            redis_process.kill()  # killed, then restarted empty on the same port
            redis_process.wait(10)
            killed = time.monotonic() - load.started
            _, redis_process = start_private_redis(directory, port=int(port_text))
            time.sleep(10)
        print("redis drill (4 client threads, default route, 2 workers):")
        print(f"  before the stall:        {load.summary(0, stall_start)}")
        print(f"  during a 10 s SIGSTOP:   {load.summary(stall_start, stall_end)}")
        print(f"  after SIGCONT:           {load.summary(stall_end, killed)}")
        print(f"  killed, restarted empty: {load.summary(killed)}")
        print(f"  all phases:              {load.summary()}")
        print(
            f"  store after the drill: versions {store.versions('pantry-checkout')}, "
            f"aliases { {a: r.version for a, r in store.aliases('pantry-checkout').items()} } (re-seeded)"
        )
    finally:
        server.terminate()
        server.wait(30)
        redis_process.kill()


def _worker_rss_kib(parent: int) -> dict[int, int]:
    out = {}
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            status = (entry / "status").read_text()
        except OSError:
            continue
        fields = dict(line.split(":", 1) for line in status.splitlines() if ":" in line)
        if fields.get("PPid", "").strip() == str(parent) and "VmRSS" in fields:
            out[int(entry.name)] = int(fields["VmRSS"].split()[0])
    return out


def _spin(seconds: float) -> None:
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        pass


def drill_soak(seconds: int = 60) -> None:
    root = Path(tempfile.mkdtemp()) / "store"
    from calibration.bundle import DirectoryStore

    DirectoryStore(root).put_version(example_bundle())
    port = free_port()
    server = _serve(str(root), port)
    burners = [
        subprocess.Popen(
            [sys.executable, "-c", f"from benchmarks.drill_service import _spin; _spin({seconds})"], cwd=ROOT
        )
        for _ in range(os.cpu_count() or 2)
    ]
    try:
        time.sleep(1)
        before = _worker_rss_kib(server.pid)
        with Load(f"http://127.0.0.1:{port}") as load:
            time.sleep(seconds)
        after = _worker_rss_kib(server.pid)
    finally:
        for burner in burners:
            burner.kill()
        server.terminate()
        server.wait(30)
        err = _server_log(server)
    restarts = sum(1 for line in err.splitlines() if "died" in line or "not responding" in line)
    growth = {pid: after.get(pid, 0) - kib for pid, kib in before.items()}
    print(f"soak ({seconds} s, both cores also busy with spinning processes): {load.summary()}")
    print(f"  worker restarts: {restarts}; worker pids before {sorted(before)}, after {sorted(after)}")
    print("  RSS growth per worker: " + ", ".join(f"{pid}: {kib / 1024:+.1f} MiB" for pid, kib in growth.items()))


def main(argv: list[str]) -> int:
    print(f"machine: {machine()}; example keys: {len(CASES['keys'])}")
    drills = {"schemathesis": drill_schemathesis, "redis": drill_redis, "soak": drill_soak}
    for name in argv or list(drills):
        start_cpu = time.process_time()
        start = time.perf_counter()
        drills[name]()
        children = resource.getrusage(resource.RUSAGE_CHILDREN)
        print(
            f"  [{name}: {time.perf_counter() - start:.0f} s wall, {time.process_time() - start_cpu:.1f} CPU s here, "
            f"{children.ru_utime + children.ru_stime:.1f} CPU s in child processes so far]"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
