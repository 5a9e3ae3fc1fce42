"""`mixscore up` as a newcomer and a process supervisor use it: every stop signal ends the
whole stack (API, fit worker, demo helper, redis-server), a second `up` on a taken port or
data folder starts nothing, and the console carries the banner, not the access lines."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest

from service.embedded import free_port

from .servers import answers_ready, stack, up_process, wait_gone


def command_of(pid: int) -> str:
    try:
        return (Path("/proc") / str(pid) / "cmdline").read_bytes().replace(b"\0", b" ").decode()
    except OSError:
        return ""


@pytest.mark.parametrize(("signum", "to_group"), [(signal.SIGTERM, False),
                                                  (signal.SIGHUP, False),
                                                  (signal.SIGTERM, True),
                                                  (signal.SIGINT, True)])
def test_a_stop_signal_ends_the_whole_stack(tmp_path: Path, signum: int, to_group: bool) -> None:
    with up_process(tmp_path / "data", "--no-demo") as (process, _):
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
    with up_process(data, "--no-demo") as (first, url):
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
        assert answers_ready(url)


def test_the_console_of_up(tmp_path: Path) -> None:
    """The banner, one line when the demo model starts fitting and one when it serves; while
    it fits, scoring it names the job. Access lines go to the data folder's access.log."""
    with up_process(tmp_path / "data") as (process, url):
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
