"""The service's request path in process: the whole ASGI app (middleware, dependencies, validation,
scoring, response) driven without HTTP, so the figures are CPU per request with no load generator
sharing the cores.

Baseline in the same process: ``/healthz`` through the same app. Figures: CPU ms per request for
/healthz, one 40-item vector and 1,000 vectors, and one vector's cost as a multiple of /healthz's
(speed issue target: a single-vector score at least half the /healthz rate, i.e. at most 2x its cost).
Every figure is measured twice; the request log lines go to stderr (send them to /dev/null, as a
deployment sends them to its log pipe: writing them is part of every request). ``--code PATH``
measures another checkout of equitheta (e.g. a git worktree of an older commit) with the same
harness, for a before/after comparison.
"""

from __future__ import annotations

import argparse
import asyncio
import sys
import tempfile
import time
from pathlib import Path
from typing import Any


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--code", type=Path, help="another equitheta checkout to import instead of this one")
    parser.add_argument("--store", type=Path, help="a store holding bench40 (default: made in a temporary folder)")
    parser.add_argument(
        "--redis", metavar="URL", help="serve from this Redis (bench40 copied under a prefix of its own, then removed)"
    )
    args = parser.parse_args()
    if args.code is not None:
        sys.path.insert(0, str(args.code.resolve()))
    from benchmarks.bench_service import body, make_store
    from benchmarks.common import machine
    from service.main import create_app
    from service.settings import Settings

    store = args.store or Path(tempfile.mkdtemp()) / "store"
    items = make_store(store) if args.store is None else [f"I{j:02d}" for j in range(40)]
    settings = Settings(store=str(store))
    if args.redis:
        import uuid

        from calibration.bundle import DirectoryStore, open_store

        prefix = f"bench-request-path-{uuid.uuid4().hex[:8]}"
        open_store(args.redis, prefix=prefix).put_version(DirectoryStore(store).get("bench40", 1))
        settings = Settings(store=args.redis, redis_prefix=prefix)
    app = create_app(settings)
    single, batch = body(items, 1).encode(), body(items, 1000).encode()

    async def call(path: str, method: str = "GET", payload: bytes = b"") -> None:
        sent = False

        async def receive() -> dict[str, Any]:
            nonlocal sent
            if not sent:
                sent = True
                return {"type": "http.request", "body": payload, "more_body": False}
            await asyncio.sleep(3600)
            return {"type": "http.disconnect"}

        answers: list[dict[str, Any]] = []

        async def send(message: dict[str, Any]) -> None:
            answers.append(message)

        headers = [(b"host", b"bench"), (b"content-type", b"application/json")]
        headers.append((b"content-length", str(len(payload)).encode()))
        scope = {
            "type": "http",
            "asgi": {"version": "3.0"},
            "http_version": "1.1",
            "method": method,
            "scheme": "http",
            "path": path,
            "raw_path": path.encode(),
            "query_string": b"",
            "root_path": "",
            "headers": headers,
            "client": ("127.0.0.1", 1),
            "server": ("127.0.0.1", 80),
        }
        await app(scope, receive, send)
        assert answers[0]["status"] == 200, answers[0]

    async def cpu_ms(args: tuple[Any, ...], n: int) -> float:
        start = time.process_time()
        for _ in range(n):
            await call(*args)
        return (time.process_time() - start) / n * 1000

    async def run() -> None:
        score = "/v1/bundles/bench40/scores"
        async with app.router.lifespan_context(app):
            for _ in range(20):  # warm: the bundle loaded, caches filled
                await call("/healthz")
                await call(score, "POST", single)
                await call(score, "POST", batch)
            for run_no in (1, 2):
                health = await cpu_ms(("/healthz",), 1500)
                one = await cpu_ms((score, "POST", single), 1500)
                many = await cpu_ms((score, "POST", batch), 60)
                print(
                    f"pass {run_no}: /healthz {health:.3f} CPU ms; one vector {one:.3f} ({one / health:.2f}x /healthz, "
                    f"target <= 2x); 1,000 vectors {many:.2f} ({1000 / many * 1000:,.0f} vectors per CPU second)"
                )

    where = f"Redis store {args.redis}" if args.redis else "directory store"
    print(f"machine: {machine()}; code: {args.code or 'this checkout'}; {where}")
    try:
        asyncio.run(run())
    finally:
        if args.redis:
            import redis

            client = redis.Redis.from_url(args.redis)
            for key in client.scan_iter(f"{prefix}*"):
                client.delete(key)
    return 0


if __name__ == "__main__":
    sys.exit(main())
