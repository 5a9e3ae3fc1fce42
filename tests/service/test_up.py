"""`mixscore up` as a newcomer and a process supervisor use it: every stop signal ends the
whole stack (API, fit worker, demo helper, redis-server), a second `up` on a taken port or
data folder starts nothing, and the console carries the banner, not the access lines."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import pytest

from service.embedded import free_port

STARTUP_S = 60


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


def command_of(pid: int) -> str:
    try:
        return (Path("/proc") / str(pid) / "cmdline").read_bytes().replace(b"\0", b" ").decode()
    except OSError:
        return ""


@contextmanager
def up(data_dir: Path, *options: str, port: int | None = None
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
        deadline = time.monotonic() + STARTUP_S
        while not _answers(url):
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


def _answers(url: str) -> bool:
    try:
        return httpx.get(f"{url}/readyz", timeout=1).status_code == 200
    except httpx.HTTPError:
        return False


def wait_gone(pids: set[int], limit_s: float = 45) -> set[int]:
    deadline = time.monotonic() + limit_s
    while (alive := pids & set(children())) and time.monotonic() < deadline:
        time.sleep(0.1)
    return alive


@pytest.mark.parametrize(("signum", "to_group"), [(signal.SIGTERM, False),
                                                  (signal.SIGHUP, False),
                                                  (signal.SIGTERM, True),
                                                  (signal.SIGINT, True)])
def test_a_stop_signal_ends_the_whole_stack(tmp_path: Path, signum: int, to_group: bool) -> None:
    with up(tmp_path / "data", "--no-demo") as (process, _):
        family = stack(process.pid)
        commands = " ".join(command_of(pid) for pid in family)
        assert "redis-server" in commands and "service.cli worker" in commands, commands
        if to_group:  # what a terminal's Ctrl-C or a supervisor's group kill sends
            os.killpg(process.pid, signum)
        else:
            process.send_signal(signum)
        as_terminate = signal.SIGTERM if signum == signal.SIGHUP else signum
        assert process.wait(45) == 128 + as_terminate
        assert wait_gone(family) == set(), [command_of(pid) for pid in family]
        assert "embedded redis-server stopped" in process.stdout.read()  # type: ignore[union-attr]


def test_a_second_up_starts_nothing(tmp_path: Path) -> None:
    data = tmp_path / "data"
    with up(data, "--no-demo") as (first, url):
        before = stack(first.pid)
        port = int(url.rsplit(":", 1)[1])
        for options, message in [
            (["--data-dir", str(tmp_path / "other"), "--port", str(port)],
             f"mixscore up: port {port} on 127.0.0.1 is taken (Address already in use); stop "
             f"what listens there or choose another with --port\n"),
            (["--data-dir", str(data), "--port", str(free_port())],
             f"mixscore up: data folder {data / 'redis'} is in use by process {first.pid}; "
             f"stop it or choose another folder with --data-dir\n"),
        ]:
            second = subprocess.run([sys.executable, "-m", "service.cli", "up", "--no-demo",
                                     *options], capture_output=True, text=True, timeout=60)
            assert (second.returncode, second.stdout, second.stderr) == (1, "", message)
        assert not (tmp_path / "other").exists()
        assert stack(first.pid) == before, "the second up started or stopped something"
        assert _answers(url)


def test_the_console_of_up(tmp_path: Path) -> None:
    """The banner, one line when the demo model starts fitting and one when it serves; while
    it fits, scoring it names the job. Access lines go to the data folder's access.log."""
    with up(tmp_path / "data") as (process, url):
        lines: list[str] = []

        def read_until(text: str) -> None:
            deadline = time.monotonic() + 120
            while not any(text in line for line in lines):
                assert time.monotonic() < deadline, lines
                lines.append(process.stdout.readline())  # type: ignore[union-attr]

        read_until("demo model 'wind-farm': fitting")
        answer = httpx.post(f"{url}/v1/models/wind-farm/log-density",
                            json={"points": [[14.2, 1985, 16.0, 51.5, 9.0, 2.9]]})
        assert answer.status_code == 404
        assert answer.json()["type"] == "urn:mixscore:problem:model-being-fitted"
        assert answer.json()["job"] in lines[-1]
        read_until("demo model 'wind-farm': serving version 1")
        assert httpx.post(f"{url}/v1/models/wind-farm/log-density", json={
            "points": [[14.2, 1985, 16.0, 51.5, 9.0, 2.9]]}).status_code == 200
        os.killpg(process.pid, signal.SIGTERM)
        lines += process.stdout.readlines()  # type: ignore[union-attr]
    console = "".join(lines)
    assert f"access log: {tmp_path / 'data' / 'access.log'}" in console
    fitting = [line for line in lines if line.startswith("demo model 'wind-farm': fitting")]
    serving = [line for line in lines if line.startswith("demo model 'wind-farm': serving")]
    assert len(fitting) == len(serving) == 1, console
    assert '"logger":"mixscore.access"' not in console
    access = (tmp_path / "data" / "access.log").read_text().splitlines()
    assert any('"route":"/v1/models/{name}/log-density"' in line for line in access)
