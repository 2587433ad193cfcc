"""`equitheta serve`: hand over to the service in a process of its own (calibration never imports service)."""

from __future__ import annotations

import argparse
import importlib.util
import os
import sys

from calibration.cli import UsageError

# Modules the service needs beyond the calibration package (the "service" extra).
SERVICE_MODULES = ("fastapi", "uvicorn", "pydantic_settings", "redis", "orjson", "prometheus_client")


def _installed(module: str) -> bool:
    try:
        return importlib.util.find_spec(module) is not None
    except (ImportError, ValueError):  # a module blocked or half-installed counts as missing
        return False


def run_serve(args: argparse.Namespace) -> int:
    """``equitheta serve``: run the scoring service (needs the service extras)."""
    missing = [m for m in SERVICE_MODULES if not _installed(m)]
    if missing or not _installed("service"):
        raise UsageError(
            "the scoring service needs the service extras, which are not installed "
            f"(missing: {', '.join(missing) or 'the service package'}); install them with: "
            "pip install 'equitheta[service]'"
        )
    argv = [sys.executable, "-m", "service"]
    for option in ("store", "redis_url", "host", "port", "workers", "worker_healthcheck_timeout"):
        value = getattr(args, option)
        if value is not None:
            argv += ["--" + option.replace("_", "-"), str(value)]
    os.execv(sys.executable, argv)
    return 1  # not reached
