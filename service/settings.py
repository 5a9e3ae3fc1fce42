"""Settings, read once from ``MIXSCORE_*`` environment variables; failing fast."""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

PREFIX = "MIXSCORE_"
LOG_LEVELS = ("DEBUG", "INFO", "WARNING", "ERROR", "CRITICAL")
REDIS_MODES = ("single", "sentinel", "cluster")
METRICS_ACCESS = ("open", "key")


class SettingsError(ValueError):
    """A setting could not be read; the message names the variable."""


def _env(name: str, help: str) -> Any:
    """A settings field read from ``MIXSCORE_<NAME>``; ``help`` documents it."""
    return field(metadata={"env": PREFIX + name, "help": help})


@dataclass(frozen=True)
class Settings:
    """Every setting of the service, with its default."""

    redis_url: str = _env(
        "REDIS_URL", "Redis that keeps all state; when unset, `mixscore up` starts its own. "
        "In cluster mode any one node; in sentinel mode only its password, TLS and database "
        "count.")
    redis_mode: str = _env(
        "REDIS_MODE", "single (one endpoint), sentinel (the primary the Sentinels name) or "
        "cluster (Redis Cluster).")
    redis_sentinels: str = _env(
        "REDIS_SENTINELS", "Sentinel mode: comma-separated host:port of the Sentinels.")
    redis_sentinel_primary: str = _env(
        "REDIS_SENTINEL_PRIMARY", "Sentinel mode: the name the Sentinels monitor the primary "
        "under.")
    redis_min_replicas: str = _env(
        "REDIS_MIN_REPLICAS", "Replicas that must confirm a write (a version, a serving "
        "change, a fit job or its result, a dataset chunk) before it is acknowledged; unset: "
        "1 in sentinel and cluster modes, 0 in single.")
    redis_replica_timeout_s: float = _env(
        "REDIS_REPLICA_TIMEOUT_S", "How long a write waits for MIXSCORE_REDIS_MIN_REPLICAS; "
        "past it the write is answered 503 not-replicated.")
    host: str = _env("HOST", "Address to listen on.")
    port: int = _env("PORT", "Port to listen on.")
    api_keys_file: str = _env(
        "API_KEYS_FILE", "JSON file of API keys (salted hashes); no keys: loopback only.")
    api_keys: str = _env("API_KEYS", "The same JSON inline, for container secrets.")
    key_prefix: str = _env("KEY_PREFIX", "Prefix of every Redis key and channel.")
    max_body_bytes: int = _env("MAX_BODY_BYTES", "Largest request body accepted.")
    max_points: int = _env("MAX_POINTS", "Most points in one scoring request.")
    max_dimension: int = _env("MAX_DIMENSION", "Most features of a model.")
    max_components: int = _env("MAX_COMPONENTS", "Most components of a model.")
    max_samples: int = _env("MAX_SAMPLES", "Most samples in one request.")
    cache_bytes: int = _env("CACHE_BYTES", "Memory for compiled models per API worker (LRU).")
    stamp_check_s: float = _env(
        "STAMP_CHECK_S", "Longest a worker trusts its cached serving version unchecked.")
    redis_timeout_s: float = _env("REDIS_TIMEOUT_S", "Timeout of one Redis command.")
    ready_timeout_s: float = _env("READY_TIMEOUT_S", "Timeout of the Redis ping of /readyz.")
    data_dir: str = _env("DATA_DIR", "Folder of the embedded Redis of `mixscore up`.")
    job_claim_idle_s: float = _env(
        "JOB_CLAIM_IDLE_S", "Silence after which another worker takes over a running job.")
    worker_metrics_port: int = _env(
        "WORKER_METRICS_PORT", "Port of a fit worker's /metrics (on MIXSCORE_HOST); a port "
        "already taken is logged and skipped.")
    dataset_ttl_s: float = _env(
        "DATASET_TTL_S", "An uploaded dataset expires after this long without use.")
    job_max_attempts: int = _env(
        "JOB_MAX_ATTEMPTS", "Runs of a job (its worker stopped or died) before it fails.")
    job_retention_s: float = _env(
        "JOB_RETENTION_S", "How long a finished job (its state, progress and problem) is "
        "kept; then it expires.")
    dataset_max_bytes: int = _env(
        "DATASET_MAX_BYTES", "Largest dataset, all its chunks together (8 bytes a value).")
    rate_limit: int = _env(
        "RATE_LIMIT", "Requests per second one API key may send (all API processes together).")
    max_jobs_per_model: int = _env(
        "MAX_JOBS_PER_MODEL", "Most fit jobs of one model queued or running at once.")
    log_level: str = _env(
        "LOG_LEVEL", "DEBUG, INFO (one line per request), WARNING, ERROR or CRITICAL.")
    fit_blas_threads: int = _env(
        "FIT_BLAS_THREADS", "BLAS threads of a fit worker; its passes run on two threads "
        "of their own, and 1 was measured fastest (README, Performance).")
    source_roots: str = _env(
        "SOURCE_ROOTS", "Comma-separated path or URL prefixes under which fit jobs may read "
        "source files; unset: no sources.")
    dask_scheduler: str = _env(
        "DASK_SCHEDULER", "Address (tcp://host:port) of a Dask scheduler on whose workers the "
        "passes of source fits run; unset: in the fit worker.")
    drift_window: int = _env(
        "DRIFT_WINDOW", "Scored complete rows per model version, the last ones of all API "
        "processes, over which mixscore_drift_ks_statistic is computed at each scrape.")
    metrics_access: str = _env(
        "METRICS_ACCESS", "Who may read the API's /metrics: `open` (no key; keep it inside "
        "your network) or `key` (an API key with the `metrics` scope, or `admin`).")
    access_log: str = _env(
        "ACCESS_LOG", "Where the line per request goes: `-` for standard error, with the "
        "other logs, or a file to append to (`mixscore up`: `<data dir>/access.log`).")

    def __post_init__(self) -> None:
        self._check_redis_mode()
        if self.metrics_access not in METRICS_ACCESS:
            raise SettingsError(f"MIXSCORE_METRICS_ACCESS must be one of "
                                f"{', '.join(METRICS_ACCESS)}; got {self.metrics_access!r}")
        if self.log_level.upper() not in LOG_LEVELS:
            raise SettingsError(f"MIXSCORE_LOG_LEVEL must be one of {', '.join(LOG_LEVELS)}; "
                                f"got {self.log_level!r}")

    def _check_redis_mode(self) -> None:
        if self.redis_mode not in REDIS_MODES:
            raise SettingsError(f"MIXSCORE_REDIS_MODE must be one of {', '.join(REDIS_MODES)}; "
                                f"got {self.redis_mode!r}")
        if self.redis_min_replicas and not self.redis_min_replicas.isdigit():
            raise SettingsError("MIXSCORE_REDIS_MIN_REPLICAS must be a whole number, 0 or more; "
                                f"got {self.redis_min_replicas!r}")
        if self.redis_mode != "sentinel":
            return
        if not self.redis_sentinel_primary:
            raise SettingsError("MIXSCORE_REDIS_MODE=sentinel needs "
                                "MIXSCORE_REDIS_SENTINEL_PRIMARY (the monitored name)")
        items = [item.strip() for item in self.redis_sentinels.split(",") if item.strip()]
        if not items or not all(item.rpartition(":")[2].isdigit() and item.rpartition(":")[0]
                                for item in items):
            raise SettingsError("MIXSCORE_REDIS_MODE=sentinel needs MIXSCORE_REDIS_SENTINELS as "
                                f"host:port,host:port,...; got {self.redis_sentinels!r}")

    @classmethod
    def from_env(cls, environ: Mapping[str, str] | None = None, **overrides: Any) -> Settings:
        environ = os.environ if environ is None else environ
        values: dict[str, Any] = {}
        for item in dataclasses.fields(cls):
            name = item.metadata["env"]
            raw = environ.get(name)
            if raw is None or raw == "":
                values[item.name] = DEFAULTS[item.name]
                continue
            kind = type(DEFAULTS[item.name])
            try:
                value = kind(raw)
            except ValueError:
                raise SettingsError(f"{name} must be a {kind.__name__}; got {raw!r}") from None
            if kind in (int, float) and value <= 0:
                raise SettingsError(f"{name} must be positive; got {raw!r}")
            values[item.name] = value
        values.update(overrides)
        return cls(**values)

    @property
    def min_replicas(self) -> int:
        """Replicas a write waits for: the setting, else by mode (a single server may
        have none)."""
        if self.redis_min_replicas:
            return int(self.redis_min_replicas)
        return 0 if self.redis_mode == "single" else 1

    @property
    def data_path(self) -> Path:
        return Path(self.data_dir)


DEFAULTS: dict[str, Any] = {
    "redis_url": "redis://127.0.0.1:6379/0",
    "redis_mode": "single",
    "redis_sentinels": "",
    "redis_sentinel_primary": "",
    "redis_min_replicas": "",
    "redis_replica_timeout_s": 1.0,
    "host": "127.0.0.1",
    "port": 8000,
    "api_keys_file": "",
    "api_keys": "",
    "key_prefix": "mixscore",
    "max_body_bytes": 32 * 2**20,
    "max_points": 100_000,
    "max_dimension": 512,
    "max_components": 64,
    "max_samples": 100_000,
    "cache_bytes": 256 * 2**20,
    "stamp_check_s": 0.5,
    "redis_timeout_s": 2.0,
    "ready_timeout_s": 0.5,
    "data_dir": "data",
    "job_claim_idle_s": 30.0,
    "job_max_attempts": 3,
    "job_retention_s": 7 * 86400.0,
    "dataset_max_bytes": 2**30,
    "dataset_ttl_s": 86400.0,
    "worker_metrics_port": 9200,
    "max_jobs_per_model": 4,
    "rate_limit": 1000,
    "log_level": "INFO",
    "metrics_access": "open",
    "access_log": "-",
    "drift_window": 1000,
    "source_roots": "",
    "dask_scheduler": "",
    "fit_blas_threads": 1,
}


def documented() -> list[tuple[str, str, str]]:
    """(variable, default, help) for every setting, for the README and `--help`."""
    return [
        (item.metadata["env"], repr(DEFAULTS[item.name]) if DEFAULTS[item.name] != "" else "",
         item.metadata["help"])
        for item in dataclasses.fields(Settings)
    ]
