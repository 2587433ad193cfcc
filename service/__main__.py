"""``python -m service``: run the scoring service under uvicorn (what ``equitheta serve`` execs)."""

from __future__ import annotations

import sys


def serve(argv: list[str] | None = None) -> int:
    """``python -m service [--store ...] [--redis-url ...] [--host --port --workers ...]``.

    What ``equitheta serve`` runs. The access log stays off (uvicorn's would print query strings,
    which may carry keys); each request is logged by the service itself without keys or bodies.
    """
    import argparse
    import os
    import shutil
    import tempfile

    import uvicorn
    from pydantic import ValidationError

    from service.settings import Settings

    parser = argparse.ArgumentParser(prog="equitheta serve")
    parser.add_argument("--store", help="bundle directory (or a redis:// URL); default: EQUITHETA_STORE")
    parser.add_argument("--redis-url", help="shared Redis store; overrides --store for bundles")
    parser.add_argument("--host", help="address to bind; default: EQUITHETA_HOST or 127.0.0.1")
    parser.add_argument("--port", type=int, help="port; default: EQUITHETA_PORT or 8000")
    parser.add_argument("--workers", type=int, help="worker processes; default: EQUITHETA_WORKERS or 1")
    parser.add_argument(
        "--worker-healthcheck-timeout",
        type=float,
        help="seconds before a worker that does not answer its health check is restarted; "
        "default: EQUITHETA_WORKER_HEALTHCHECK_TIMEOUT or 60",
    )
    args = parser.parse_args(argv)
    overrides = {
        "store": args.redis_url or args.store,
        "host": args.host,
        "port": args.port,
        "workers": args.workers,
        "worker_healthcheck_timeout": args.worker_healthcheck_timeout,
    }
    for key, value in overrides.items():
        if value is not None:
            os.environ[f"EQUITHETA_{key.upper()}"] = str(value)  # the workers read the same settings
    try:
        settings = Settings()
    except ValidationError as exc:
        for error in exc.errors():
            print(f"configuration error: {error['msg']}", file=sys.stderr)
        return 2
    if not settings.has_keys:
        print(f"no API keys configured: open access, bound to loopback only ({settings.host})", file=sys.stderr)
    metrics_dir = None
    if settings.workers > 1 and not os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        metrics_dir = tempfile.mkdtemp(prefix="equitheta-metrics-")
        os.environ["PROMETHEUS_MULTIPROC_DIR"] = metrics_dir  # every worker counts into the same files
    try:
        uvicorn.run(
            "service.main:app_from_env",
            factory=True,
            host=settings.host,
            port=settings.port,
            workers=settings.workers,
            log_level=settings.log_level,
            access_log=False,
            timeout_worker_healthcheck=settings.worker_healthcheck_timeout,
        )
    finally:
        if metrics_dir is not None:
            shutil.rmtree(metrics_dir, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(serve())
