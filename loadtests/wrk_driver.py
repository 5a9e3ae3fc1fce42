"""wrk (Debian package `wrk`) driven from Python: one bounded run, its figures as numbers.

A Lua script sets the body, media types and API key from the environment (so the key
never shows in a process list) and prints the run's figures as one JSON line.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

SCRIPT = r"""
local body_path = os.getenv("MIXSCORE_LOAD_BODY") or ""
if body_path ~= "" then
  local file = assert(io.open(body_path, "rb"))
  wrk.body = file:read("*a"); file:close()
  wrk.method = "POST"
  wrk.headers["Content-Type"] = os.getenv("MIXSCORE_LOAD_TYPE")
  wrk.headers["Accept"] = os.getenv("MIXSCORE_LOAD_TYPE")
end
local key = os.getenv("MIXSCORE_LOAD_KEY") or ""
if key ~= "" then wrk.headers["Authorization"] = "Bearer " .. key end

done = function(summary, latency, requests)
  local e = summary.errors
  io.write(string.format(
    'MIXSCORE_RESULT {"requests": %d, "duration_us": %d, "p50_us": %d, "p95_us": %d, ' ..
    '"p99_us": %d, "status_errors": %d, "socket_errors": %d}\n',
    summary.requests, summary.duration, latency:percentile(50), latency:percentile(95),
    latency:percentile(99), e.status, e.connect + e.read + e.write + e.timeout))
end
"""


@dataclass(frozen=True)
class Run:
    requests: int
    seconds: float
    p50_ms: float
    p95_ms: float
    p99_ms: float
    errors: int  # non-2xx/3xx answers plus connect, read, write and timeout errors

    @property
    def rps(self) -> float:
        return self.requests / self.seconds


def available() -> bool:
    return shutil.which("wrk") is not None


def run(url: str, duration_s: float, connections: int, body: bytes | None = None,
        media_type: str = "application/json", api_key: str = "") -> Run:
    """One wrk run of ``duration_s`` against ``url``: GET without a body, else POST."""
    with tempfile.TemporaryDirectory(prefix="mixscore-load-") as folder:
        script = Path(folder) / "load.lua"
        script.write_text(SCRIPT)
        env = {**os.environ, "MIXSCORE_LOAD_KEY": api_key, "MIXSCORE_LOAD_BODY": "",
               "MIXSCORE_LOAD_TYPE": media_type}
        if body is not None:
            (Path(folder) / "body").write_bytes(body)
            env["MIXSCORE_LOAD_BODY"] = str(Path(folder) / "body")
        threads = max(1, min(2, connections))
        output = subprocess.run(
            ["wrk", f"-t{threads}", f"-c{connections}", f"-d{duration_s:g}s", "-s",
             str(script), url], env=env, capture_output=True, text=True,
            timeout=duration_s + 30, check=True).stdout
    line = next(line for line in output.splitlines() if line.startswith("MIXSCORE_RESULT "))
    figures = json.loads(line.split(" ", 1)[1])
    return Run(requests=figures["requests"], seconds=figures["duration_us"] / 1e6,
               p50_ms=figures["p50_us"] / 1e3, p95_ms=figures["p95_us"] / 1e3,
               p99_ms=figures["p99_us"] / 1e3,
               errors=figures["status_errors"] + figures["socket_errors"])
