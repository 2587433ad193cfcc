"""Service throughput on loopback: uvicorn with 2 workers, load from wrk (Debian package) when present.

Figures: requests/s and p50/p99 latency for /healthz and for a single-vector 40-item score
(target: scoring at least half the /healthz rate), and vectors scored per second with
1,000 vectors per request (target: at least 100,000), for the directory store and (when a Redis
answers on 127.0.0.1:6379) the Redis store, each twice; beside each figure the CPU seconds each
worker spent (an uneven split means wrk's connections went mostly to one worker). Bounded: each
run lasts a few seconds. The load generator shares the 2 cores with the server, so the figures
are lower bounds and noisy.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import numpy as np

from benchmarks.common import machine, two_pl_data
from calibration.bundle import DirectoryStore
from calibration.io import ResponseData
from calibration.pipeline import calibrate_data

DURATION = 8
CONNECTIONS = 64
"""wrk connections for /healthz and one vector. With 16, the two workers often split them unevenly (one
worker near 55% CPU in 5 of 10 runs on 2026-12-03), and /healthz swung 1,150-3,830 req/s with it; with
64 both workers were busy in every run. Each figure prints the CPU seconds each worker spent."""
BATCH_CONNECTIONS = 16
"""wrk connections for 1,000-vector batches (with 4, all four sometimes went to one worker: half the rate)."""


def make_store(root: Path) -> list[str]:
    x, _, _ = two_pl_data(5000, 40, seed=4)
    items = tuple(f"I{j:02d}" for j in range(40))
    data = ResponseData(
        ids=tuple(map(str, range(5000))),
        item_ids=items,
        responses=x,
        n_categories=np.full(40, 2),
        models=("2pl",) * 40,
        source="simulated",
    )
    DirectoryStore(root).publish(calibrate_data(data, name="bench40").bundle)
    return list(items)


def body(items: list[str], n: int, seed: int = 1) -> str:
    rng = np.random.default_rng(seed)
    return json.dumps(
        {"responses": [{"id": f"r{i}", "answers": {it: int(rng.integers(0, 2)) for it in items}} for i in range(n)]}
    )


def wrk(url: str, payload: str | None, connections: int, tmp: Path) -> dict[str, float]:
    args = ["wrk", "-t2", f"-c{connections}", f"-d{DURATION}s", "--latency", url]
    if payload is not None:
        script = tmp / f"post{len(payload)}.lua"
        script.write_text(
            f'wrk.method = "POST"\nwrk.headers["Content-Type"] = "application/json"\nwrk.body = {json.dumps(payload)}\n'
        )
        args[1:1] = ["-s", str(script)]
    text = subprocess.run(args, capture_output=True, text=True, timeout=DURATION + 30).stdout

    def latency(label: str) -> float:
        match = re.search(rf"^\s+{label}%\s+([\d.]+)(us|ms|s)\s*$", text, re.M)
        if not match:
            return float("nan")
        value, unit = float(match.group(1)), match.group(2)
        return value * {"us": 0.001, "ms": 1.0, "s": 1000.0}[unit]

    rate = re.search(r"Requests/sec:\s+([\d.]+)", text)
    non_2xx = re.search(r"Non-2xx or 3xx responses: (\d+)", text)
    return {
        "rps": float(rate.group(1)) if rate else float("nan"),
        "p50_ms": latency("50"),
        "p99_ms": latency("99"),
        "errors": float(non_2xx.group(1)) if non_2xx else 0.0,
    }


def python_load(url: str, payload: str | None, seconds: float = DURATION) -> dict[str, float]:
    """Fallback load generator (one keep-alive client); slower than wrk."""
    latencies = []
    with httpx.Client() as client:
        end = time.perf_counter() + seconds
        while time.perf_counter() < end:
            start = time.perf_counter()
            if payload is None:
                client.get(url)
            else:
                client.post(url, content=payload, headers={"Content-Type": "application/json"})
            latencies.append(time.perf_counter() - start)
    lat = np.array(latencies) * 1000
    return {
        "rps": len(lat) / seconds,
        "p50_ms": float(np.percentile(lat, 50)),
        "p99_ms": float(np.percentile(lat, 99)),
        "errors": 0.0,
    }


def worker_cpu(server: subprocess.Popen[bytes]) -> list[float]:
    """CPU seconds (user + system) of each uvicorn worker, the server's child processes (Linux /proc)."""
    ticks = os.sysconf("SC_CLK_TCK")
    out = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
            cmdline = (stat.parent / "cmdline").read_bytes()
        except OSError:
            continue
        if int(fields[1]) == server.pid and b"resource_tracker" not in cmdline:
            out.append((int(fields[11]) + int(fields[12])) / ticks)
    return out


def serve(store: str, port: int, env: dict[str, str]) -> subprocess.Popen[bytes]:
    """uvicorn with 2 workers on ``store``, ready to answer."""
    server = subprocess.Popen(
        [sys.executable, "-m", "service", "--store", store, "--port", str(port), "--workers", "2"],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        env=env,
    )
    for _ in range(200):
        try:
            if httpx.get(f"http://127.0.0.1:{port}/readyz").status_code == 200:
                break
        except httpx.HTTPError:
            time.sleep(0.1)
    return server


def main() -> int:
    print(f"machine: {machine()}")
    tmp = Path(tempfile.mkdtemp())
    items = make_store(tmp / "store")
    stores = [("directory store", str(tmp / "store"), {})]
    prefix = f"bench-{os.getpid()}"
    try:
        from calibration.bundle.redis_store import RedisStore

        redis_store = RedisStore("redis://127.0.0.1:6379/0", prefix=prefix)
        if redis_store.ping():
            source = DirectoryStore(tmp / "store")
            for version in source.versions("bench40"):
                redis_store.put_version(source.get("bench40", version))
            stores.append(("Redis store", "redis://127.0.0.1:6379/0", {"EQUITHETA_REDIS_PREFIX": prefix}))
    except Exception as exc:  # noqa: BLE001 - a benchmark without Redis still measures the directory store
        print(f"(no Redis on 127.0.0.1:6379: {exc}; directory store only)")
    single, batch = body(items, 1), body(items, 1000)
    load = (lambda u, p, c: wrk(u, p, c, tmp)) if shutil.which("wrk") else (lambda u, p, c: python_load(u, p))
    print(
        f"load generator: {'wrk, 2 threads' if shutil.which('wrk') else 'python httpx (wrk not installed)'}; "
        f"uvicorn with 2 workers; {DURATION} s per run; every figure twice"
    )
    for label, store, extra in stores:
        port = 18765
        server = serve(store, port, {**os.environ, **extra})
        base = f"http://127.0.0.1:{port}"
        try:
            score_url = f"{base}/v1/bundles/bench40/scores"
            check = httpx.post(score_url, content=batch, headers={"Content-Type": "application/json"}, timeout=30)
            assert check.status_code == 200 and len(check.json()["results"]) == 1000
            for run in (1, 2):
                print(f"{label}, pass {run}")
                figures = {}
                for name, url, payload, connections in (
                    ("/healthz", f"{base}/healthz", None, CONNECTIONS),
                    ("score, 1 vector x 40 items", score_url, single, CONNECTIONS),
                    ("score, 1,000 vectors", score_url, batch, BATCH_CONNECTIONS),
                ):
                    before = worker_cpu(server)
                    r = figures[name] = load(url, payload, connections)
                    spent = " / ".join(f"{b - a:.1f}" for a, b in zip(before, worker_cpu(server), strict=False))
                    print(
                        f"  {name:<28} {r['rps']:>9,.0f} req/s  p50 {r['p50_ms']:7.2f} ms  p99 {r['p99_ms']:7.2f} ms"
                        f"  non-2xx {int(r['errors'])}  worker CPU s {spent}"
                    )
                health, one, many = figures.values()
                print(f"  single-vector score rate / healthz rate: {one['rps'] / health['rps']:.2f} (target >= 0.5)")
                print(f"  batch: {many['rps'] * 1000:,.0f} vectors scored per second (target >= 100,000)")
        finally:
            server.terminate()
            server.wait(10)
    return 0


if __name__ == "__main__":
    sys.exit(main())
