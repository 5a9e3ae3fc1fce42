"""Real `mixscore serve` processes for tests that need more than one API worker."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx

from service.embedded import free_port


@contextmanager
def api_process(redis_url: str, key_prefix: str, workers: int = 1,
                log_file: Path | None = None, **env: str) -> Iterator[str]:
    """Start `mixscore serve` on a free port; yield its base URL; stop it with SIGTERM.
    Its standard error goes to ``log_file`` (kept), else to a temporary file."""
    port = free_port()
    environment = {**os.environ, "MIXSCORE_REDIS_URL": redis_url,
                   "MIXSCORE_KEY_PREFIX": key_prefix, **env}
    # Closed in finally; a pipe that filled up would stall the server.
    log = open(log_file, "w+b") if log_file else tempfile.TemporaryFile()  # noqa: SIM115
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
                   log_file: Path | None = None, **env: str
                   ) -> Iterator[subprocess.Popen[bytes]]:
    """A `mixscore worker` subprocess; stopped with SIGTERM (or already gone) at the end.
    Its standard error goes to ``log_file`` if given."""
    environment = {**os.environ, "MIXSCORE_REDIS_URL": redis_url,
                   "MIXSCORE_KEY_PREFIX": key_prefix, **env}
    command = [sys.executable, "-m", "service.cli", "worker",
               *(["--until-empty"] if until_empty else [])]
    with open(log_file or os.devnull, "wb") as log:
        process = subprocess.Popen(command, env=environment, stdout=subprocess.DEVNULL,
                                   stderr=log)
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


#: How long `mixscore up` may take to answer /readyz.
UP_STARTUP_S = 60


def children() -> dict[int, int]:
    """Parent pid of every live process, read from /proc."""
    found = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                stat = (entry / "stat").read_text()
            except OSError:
                continue
            fields = stat.rsplit(")", 1)[1].split()
            if fields[0] != "Z":  # a zombie has ended; only its parent has not reaped it
                found[int(entry.name)] = int(fields[1])
    return found


def stack(root: int) -> set[int]:
    """``root`` and all its descendants."""
    parents = children()
    family, grown = {root}, True
    while grown:
        grown = False
        for pid, parent in parents.items():
            if parent in family and pid not in family:
                family.add(pid)
                grown = True
    return {pid for pid in family if pid in parents}


@contextmanager
def up_process(data_dir: Path, *options: str, port: int | None = None
       ) -> Iterator[tuple[subprocess.Popen[str], str]]:
    """`mixscore up` in its own process group (as `make up` runs it), ready to serve."""
    port = port or free_port()
    environment = {k: v for k, v in os.environ.items() if k != "MIXSCORE_REDIS_URL"}
    environment["MIXSCORE_WORKER_METRICS_PORT"] = str(free_port())
    process = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "up", "--port", str(port), "--data-dir",
         str(data_dir), *options], env=environment, stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT, text=True, start_new_session=True)
    url = f"http://127.0.0.1:{port}"
    family: set[int] = set()
    try:
        deadline = time.monotonic() + UP_STARTUP_S
        while not answers_ready(url):
            assert process.poll() is None, process.stdout.read()  # type: ignore[union-attr]
            assert time.monotonic() < deadline, "mixscore up did not start"
            time.sleep(0.1)
        family = stack(process.pid)
        yield process, url
    finally:
        # A test that stopped it has checked how; else stop it as a supervisor would, and
        # leave nothing behind (redis-server runs in a session of its own).
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGTERM)
            process.communicate(timeout=60)
        for pid in wait_gone(family, 5):
            os.kill(pid, signal.SIGKILL)
        process.wait()
        process.stdout.close()  # type: ignore[union-attr]


def answers_ready(url: str) -> bool:
    try:
        return httpx.get(f"{url}/readyz", timeout=1).status_code == 200
    except httpx.HTTPError:
        return False


def wait_gone(pids: set[int], limit_s: float = 45) -> set[int]:
    deadline = time.monotonic() + limit_s
    while (alive := pids & set(children())) and time.monotonic() < deadline:
        time.sleep(0.1)
    return alive
