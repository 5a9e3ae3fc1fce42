"""Real `mixscore serve` processes for tests that need more than one API worker."""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager

import httpx

from service.embedded import free_port


@contextmanager
def api_process(redis_url: str, key_prefix: str, workers: int = 1,
                **env: str) -> Iterator[str]:
    """Start `mixscore serve` on a free port; yield its base URL; stop it with SIGTERM."""
    port = free_port()
    environment = {**os.environ, "MIXSCORE_REDIS_URL": redis_url,
                   "MIXSCORE_KEY_PREFIX": key_prefix, **env}
    log = tempfile.TemporaryFile()  # noqa: SIM115 -- closed in finally; a full pipe would stall the server
    process = subprocess.Popen([sys.executable, "-m", "service.cli", "serve", "--port", str(port),
                                "--workers", str(workers)],
                               env=environment, stdout=subprocess.DEVNULL, stderr=log)
    url = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 30
        while True:
            try:
                if httpx.get(f"{url}/healthz", timeout=1).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            if process.poll() is not None or time.monotonic() > deadline:
                log.seek(0)
                raise RuntimeError(f"mixscore serve did not start: {log.read()!r}")
            time.sleep(0.1)
        yield url
    finally:
        stop(process)
        log.close()


@contextmanager
def worker_process(redis_url: str, key_prefix: str, until_empty: bool = False,
                   **env: str) -> Iterator[subprocess.Popen[bytes]]:
    """A `mixscore worker` subprocess; stopped with SIGTERM (or already gone) at the end."""
    environment = {**os.environ, "MIXSCORE_REDIS_URL": redis_url,
                   "MIXSCORE_KEY_PREFIX": key_prefix, **env}
    command = [sys.executable, "-m", "service.cli", "worker",
               *(["--until-empty"] if until_empty else [])]
    process = subprocess.Popen(command, env=environment, stdout=subprocess.DEVNULL,
                               stderr=subprocess.DEVNULL)
    try:
        yield process
    finally:
        stop(process)


def stop(process: subprocess.Popen[bytes]) -> None:
    """SIGTERM (a no-op if it already ended), then SIGKILL if it does not stop in 30 s."""
    if process.poll() is None:
        process.terminate()
    try:
        process.wait(30)
    except subprocess.TimeoutExpired:
        process.kill()
        process.wait()


def scrape_until(url: str, needle: str, limit_s: float = 60) -> str:
    """The text of ``url`` once it contains ``needle`` (a worker's /metrics, say)."""
    deadline = time.monotonic() + limit_s
    while True:
        try:
            text = httpx.get(url).text
            if needle in text:
                return text
        except httpx.HTTPError:
            pass
        assert time.monotonic() < deadline, f"{url} never showed {needle!r}"
        time.sleep(0.1)
