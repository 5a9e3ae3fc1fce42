"""Soak: a bounded scoring load for minutes, with the API's memory sampled each second.

Starts an embedded redis-server and `mixscore serve` (one worker) on 127.0.0.1, imports
the 16-feature, 8-component model of bench_http.py, and runs wrk (Debian package
`wrk`) against log-density with 100-point JSON batches for --duration seconds, while
reading the serving process's resident memory (VmRSS) every second. It reports the
errors and how memory moved over the last minute: a settled process grows less than
5 % there.

Run:  python loadtests/soak.py [--duration 120] [--connections 8]
Exit status 1 on any error or on growth beyond 5 % over the last minute.
"""

from __future__ import annotations

import argparse
import sys
import threading
import time
from pathlib import Path

import httpx
import msgspec
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import wrk_driver
from bench_http import bench_mixture
from local_service import local_service

GROWTH_LIMIT = 0.05


def resident_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    raise RuntimeError(f"no VmRSS for {pid}")


def serving_pid(parent: int) -> int:
    """The process that runs the app: `mixscore serve` itself with one worker, else its
    first worker process."""
    children = Path(f"/proc/{parent}/task/{parent}/children").read_text().split()
    return int(children[0]) if children else parent


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--duration", type=int, default=120)
    parser.add_argument("--connections", type=int, default=8)
    args = parser.parse_args()
    if not wrk_driver.available():
        print("soak.py needs wrk: apt-get install wrk", file=sys.stderr)
        return 2
    mixture = bench_mixture()
    points = np.random.default_rng(2).standard_normal((100, mixture.dimension)) * 3
    body = msgspec.json.encode({"points": points.tolist()})
    with local_service() as local:
        httpx.post(f"{local.url}/v1/models/soak/versions", json={
            "structure": "full", "weights": mixture.weights.tolist(),
            "means": mixture.means.tolist(),
            "covariances": mixture.covariances.tolist()}).raise_for_status()
        pid = serving_pid(local.process.pid)
        samples: list[float] = []
        result: list[wrk_driver.Run] = []
        load = threading.Thread(target=lambda: result.append(wrk_driver.run(
            f"{local.url}/v1/models/soak/log-density", args.duration, args.connections, body)))
        load.start()
        while load.is_alive():
            samples.append(resident_mib(pid))
            time.sleep(1.0)
        load.join()
    run = result[0]
    minute = min(60, len(samples) // 2)
    last = np.asarray(samples[-minute:])
    slope = np.polyfit(np.arange(len(last)), last, 1)[0] * 60  # MiB per minute
    growth = (last[-1] - last[0]) / last[0]
    print(f"{args.duration} s, {args.connections} connections, 100-point JSON log-density: "
          f"{run.requests} requests ({run.rps:.0f}/s), {run.errors} errors, "
          f"p50 {run.p50_ms:.2f} ms, p99 {run.p99_ms:.2f} ms")
    print(f"resident memory of the API process (MiB): start {samples[0]:.1f}, "
          f"after {len(samples) - minute} s {last[0]:.1f}, end {last[-1]:.1f}; "
          f"last {minute} s: {growth:+.2%}, slope {slope:+.2f} MiB/min")
    return 1 if run.errors or growth > GROWTH_LIMIT else 0


if __name__ == "__main__":
    sys.exit(main())
