"""Service settings: one class, environment prefix ``EQUITHETA_``; bad values fail at start-up."""

from __future__ import annotations

import ipaddress
from pathlib import Path

from pydantic import Field, field_validator, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict

from calibration.bundle.store import REDIS_SCHEMES
from calibration.vocabulary import Scope


class Settings(BaseSettings):
    """Every setting can come from the environment, e.g. ``EQUITHETA_STORE=/srv/bundles``."""

    model_config = SettingsConfigDict(env_prefix="EQUITHETA_", extra="forbid")

    # repr=False: a redis:// URL may carry a password, and settings get printed in tracebacks.
    store: str = Field("bundles", description="bundle directory, or redis:// URL of the shared store", repr=False)
    redis_prefix: str = Field("equitheta", description="key prefix in Redis (one per deployment)")
    host: str = "127.0.0.1"
    port: int = Field(8000, ge=1, le=65535)
    workers: int = Field(1, ge=1, le=64)
    api_keys_file: Path | None = Field(None, description="file of API keys (name, scopes, SHA-256 of the key)")
    api_keys: str = Field("", description="inline keys: 'name:scope+scope:sha256hex' separated by ';'", repr=False)
    max_body_bytes: int = Field(4 * 1024 * 1024, ge=1024)
    max_vectors: int = Field(10_000, ge=1)
    preload: bool = Field(default=True, description="load every bundle at start-up")
    log_level: str = "info"
    metrics_scope: Scope | None = Field(
        None, description="scope a key needs for /metrics (default: open, like /healthz and /readyz)"
    )
    docs: bool = Field(default=True, description="serve /docs, /redoc and /openapi.json")
    worker_healthcheck_timeout: float = Field(
        60.0,
        gt=0,
        le=3600,
        description="seconds a uvicorn worker may take to answer its parent's health check before it is "
        "restarted (uvicorn's own default, 5 s, restarts busy workers on saturated CPUs)",
    )

    drift_watch: bool = Field(
        default=False,
        description="keep drift-watch counts of every scored batch in the shared Redis store (counts by theta bin "
        "and category only: no answers, no ids)",
    )
    drift_flush_seconds: float = Field(5.0, gt=0, le=300, description="how often a worker adds its counts to Redis")

    @field_validator("store")
    @classmethod
    def _store_given(cls, value: str) -> str:
        if not value.strip():
            raise ValueError("EQUITHETA_STORE is empty: give a bundle directory or a redis:// URL")
        return value

    @field_validator("api_keys_file")
    @classmethod
    def _file_exists(cls, value: Path | None) -> Path | None:
        if value is not None and not value.is_file():
            raise ValueError(f"EQUITHETA_API_KEYS_FILE: {value} is not a file")
        return value

    @model_validator(mode="after")
    def _drift_watch_needs_redis(self) -> Settings:
        if self.drift_watch and not self.store.startswith(REDIS_SCHEMES):
            raise ValueError(
                "EQUITHETA_DRIFT_WATCH=true keeps its counts in the shared Redis store: set EQUITHETA_STORE to a "
                "redis:// URL (every replica adds to the same counts)"
            )
        return self

    @model_validator(mode="after")
    def _open_only_on_loopback(self) -> Settings:
        if not self.has_keys and not is_loopback(self.host):
            raise ValueError(
                f"EQUITHETA_HOST={self.host} with no API keys configured: an open service only binds to loopback "
                "(127.0.0.1 or ::1); set EQUITHETA_API_KEYS_FILE or EQUITHETA_API_KEYS"
            )
        return self

    @property
    def has_keys(self) -> bool:
        """Whether any API key is configured (inline or in a file); without one access is open, loopback only."""
        return bool(self.api_keys.strip()) or self.api_keys_file is not None


def is_loopback(host: str) -> bool:
    """Whether ``host`` names this machine only (localhost, 127.0.0.0/8, ::1)."""
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False
