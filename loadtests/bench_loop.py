"""The event loop under heavy requests: /healthz latency and the process's peak memory.

Starts an embedded redis-server, one `mixscore serve` process and a fit worker on
127.0.0.1, fits one model and imports two (invented data), then for --seconds runs
three clients in a loop, each sending one kind of heavy request:

* 2 000 rows of 2 000 distinct missing patterns, log-density with tail fractions
  (a fitted model, k 8, d 16, full);
* explanations of 20 000 complete rows (k 32, d 16, full);
* 100 000 samples at d 256 (k 2, full), in JSON;

while a probe asks /healthz every 5 ms. It prints the probe's latency (p50, p99,
max) against the same probe with no load, and the API process's peak RSS against
the answer bodies in flight.

Goals (issue: no request stalls the loop; bounded memory): /healthz p99 <= 25 ms
under the load; peak RSS <= 1.5 x the three answer bodies. Exit status 1 when missed.

Run:  python loadtests/bench_loop.py [--seconds 20]
Loopback only, bounded by --seconds.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import threading
import time
from contextlib import ExitStack
from dataclasses import dataclass, field
from pathlib import Path

import httpx
import msgspec
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from core import Mixture
from service.embedded import EmbeddedRedis, free_port

PROBE_S = 0.005
HEALTH_P99_GOAL_S = 0.025
RSS_GOAL = 1.5


def invented(rng: np.random.Generator, k: int, d: int) -> Mixture:
    """A random full-covariance mixture (invented parameters, for load only)."""
    factors = rng.normal(size=(k, d, d)) * 0.3
    covariances = np.einsum("kij,klj->kil", factors, factors) + 0.1 * np.eye(d)
    return Mixture(np.full(k, 1 / k), rng.normal(0, 3, (k, d)), covariances, "full")


def body(mixture: Mixture) -> dict[str, object]:
    return {"structure": mixture.structure, "weights": mixture.weights.tolist(),
            "means": mixture.means.tolist(), "covariances": mixture.covariances.tolist()}


def distinct_patterns(rng: np.random.Generator, X: np.ndarray) -> np.ndarray:
    """Each row loses a different set of features (at most 12 of 16)."""
    codes = rng.choice(2**16 - 1, len(X), replace=False) + 1
    missing = ((codes[:, None] >> np.arange(X.shape[1])) & 1).astype(bool)
    missing[missing.sum(axis=1) > 12] = False
    gappy = X.copy()
    gappy[missing] = np.nan
    return gappy


def rss_bytes(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    return 0


def percentile(values: list[float], q: float) -> float:
    return float(np.quantile(np.array(values), q))


def probe(http: httpx.Client, until: float) -> list[float]:
    times = []
    while time.monotonic() < until:
        start = time.perf_counter()
        http.get("/healthz").raise_for_status()
        times.append(time.perf_counter() - start)
        time.sleep(PROBE_S)
    return times


def prepare(http: httpx.Client, rng: np.random.Generator) -> dict[str, tuple[str, bytes]]:
    """Three models and, for each, the path and body of its heavy request."""
    fitted = invented(rng, 8, 16)
    rows = fitted.sample(20_000, seed=1)[0]
    job = http.post("/v1/models/patterns/fits", json={
        "points": rows.tolist(), "components": 8, "restarts": 1, "max_iterations": 40,
        "seed": 2}).json()
    while (state := http.get(f"/v1/jobs/{job['id']}").json())["state"] not in (
            "succeeded", "failed"):
        time.sleep(0.2)
    assert state["state"] == "succeeded", state
    http.post("/v1/models/explained/versions", json=body(invented(rng, 32, 16))
              ).raise_for_status()
    http.post("/v1/models/wide/versions", json=body(invented(rng, 2, 256))).raise_for_status()
    gappy = msgspec.json.encode({"points": [
        [None if v != v else v for v in row]  # NaN: a missing value, null in JSON
        for row in distinct_patterns(rng, fitted.sample(2_000, seed=3)[0]).tolist()]})
    complete = msgspec.json.encode({"points": invented(rng, 32, 16).sample(
        20_000, seed=4)[0].tolist()})
    samples = msgspec.json.encode({"count": 100_000, "seed": 5})

    return {"2 000 distinct missing patterns": ("/v1/models/patterns/log-density", gappy),
            "20 000-row explanations, k 32": ("/v1/models/explained/explanations", complete),
            "100 000 samples, d 256": ("/v1/models/wide/samples", samples)}


@dataclass
class Load:
    """What the heavy clients saw, and the API process's peak RSS meanwhile."""

    sizes: dict[str, int] = field(default_factory=dict)
    counts: dict[str, int] = field(default_factory=dict)
    peak_rss: int = 0


def run_load(url: str, pid: int, heavy: dict[str, tuple[str, bytes]], seconds: float
             ) -> tuple[list[float], Load]:
    """The probe's latencies while every heavy request is sent in a loop of its own."""
    until = time.monotonic() + seconds
    load = Load(counts=dict.fromkeys(heavy, 0), peak_rss=rss_bytes(pid))
    stop = threading.Event()

    def loop(name: str, request: tuple[str, bytes]) -> None:
        with httpx.Client(base_url=url, timeout=600) as own:
            while time.monotonic() < until:
                answer = own.post(request[0], content=request[1],
                                  headers={"Content-Type": "application/json"})
                answer.raise_for_status()
                load.sizes[name] = len(answer.content)
                load.counts[name] += 1

    def watch() -> None:
        while not stop.is_set():
            load.peak_rss = max(load.peak_rss, rss_bytes(pid))
            time.sleep(0.02)

    threads = [threading.Thread(target=loop, args=item) for item in heavy.items()]
    watcher = threading.Thread(target=watch)
    for thread in [*threads, watcher]:
        thread.start()
    with httpx.Client(base_url=url) as prober:
        latencies = probe(prober, until)
    for thread in threads:
        thread.join()
    stop.set()
    watcher.join()
    return latencies, load


def started(stack: ExitStack, folder: str) -> tuple[str, int]:
    """Redis, one API process and a fit worker; the API's URL and pid once ready."""
    redis = EmbeddedRedis(Path(folder) / "redis")
    env = {**os.environ, "MIXSCORE_REDIS_URL": redis.start(),
           "MIXSCORE_MAX_BODY_BYTES": str(256 * 2**20), "MIXSCORE_LOG_LEVEL": "WARNING"}
    stack.callback(redis.stop)
    port = free_port()
    for command in (["serve", "--port", str(port)], ["worker"]):
        child = subprocess.Popen([sys.executable, "-m", "service.cli", *command], env=env,
                                 stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        stack.callback(child.wait, 30)
        stack.callback(child.terminate)
        if command[0] == "serve":
            api = child
    url = f"http://127.0.0.1:{port}"
    while True:
        try:
            if httpx.get(f"{url}/readyz").status_code == 200:
                return url, api.pid
        except httpx.HTTPError:
            pass
        time.sleep(0.1)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=20.0, help="length of the load")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="mixscore-bench-") as folder, ExitStack() as stack:
        url, pid = started(stack, folder)
        with httpx.Client(base_url=url, timeout=600) as http:
            heavy = prepare(http, np.random.default_rng(0))
            quiet = probe(http, time.monotonic() + 3)
        idle_rss = rss_bytes(pid)
        loaded, load = run_load(url, pid, heavy, args.seconds)

    bodies = sum(load.sizes.values())
    p99 = percentile(loaded, 0.99)
    ratio = load.peak_rss / bodies
    print(f"/healthz with no load:    p50 {percentile(quiet, 0.5) * 1e3:.1f} ms, "
          f"p99 {percentile(quiet, 0.99) * 1e3:.1f} ms ({len(quiet)} probes)")
    print(f"/healthz under the load:  p50 {percentile(loaded, 0.5) * 1e3:.1f} ms, "
          f"p99 {p99 * 1e3:.1f} ms, max {max(loaded) * 1e3:.1f} ms ({len(loaded)} probes; "
          f"goal p99 <= {HEALTH_P99_GOAL_S * 1e3:.0f} ms)")
    for name, count in load.counts.items():
        print(f"  {name}: {count} answered, {load.sizes.get(name, 0) / 1e6:.1f} MB each")
    print(f"API process RSS: {idle_rss / 1e6:.0f} MB idle, peak {load.peak_rss / 1e6:.0f} MB "
          f"= {ratio:.2f} x the {bodies / 1e6:.0f} MB of answer bodies (goal <= {RSS_GOAL})")
    return 0 if p99 <= HEALTH_P99_GOAL_S and ratio <= RSS_GOAL else 1


if __name__ == "__main__":
    sys.exit(main())
