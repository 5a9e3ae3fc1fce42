"""A throw-away service on this machine for the load scripts: an embedded redis-server
and an API server on 127.0.0.1, stopped (and its data removed) at the end."""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import httpx

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from service.embedded import EmbeddedRedis, free_port


@dataclass(frozen=True)
class Local:
    url: str
    process: subprocess.Popen[bytes]


def serve_command(port: int, workers: int = 1, server: str = "mixscore") -> list[str]:
    """`mixscore serve` (uvicorn), or the same app under granian for comparison
    (`pip install granian`)."""
    if server == "mixscore":
        return [sys.executable, "-m", "service.cli", "serve", "--port", str(port),
                "--workers", str(workers)]
    return [sys.executable, "-m", "granian", "--interface", "asgi", "--factory",
            "--loop", "uvloop", "--port", str(port), "--workers", str(workers),
            "--log-level", "warning", "--no-ws", "service.app:create_app"]


@contextmanager
def local_service(env: dict[str, str] | None = None, workers: int = 1,
                  server: str = "mixscore") -> Iterator[Local]:
    """Yields once /healthz answers; ``env`` adds MIXSCORE_* settings."""
    with tempfile.TemporaryDirectory(prefix="mixscore-load-") as folder:
        redis = EmbeddedRedis(Path(folder) / "redis")
        environment = {**os.environ, "MIXSCORE_REDIS_URL": redis.start(), **(env or {})}
        port = free_port()
        process = subprocess.Popen(serve_command(port, workers, server), env=environment,
                                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        url = f"http://127.0.0.1:{port}"
        try:
            for _ in range(300):
                try:
                    if httpx.get(f"{url}/healthz").status_code == 200:
                        break
                except httpx.HTTPError:
                    time.sleep(0.1)
            yield Local(url, process)
        finally:
            process.terminate()
            process.wait(30)
            redis.stop()
