"""The fit-job path against the fit itself, measured in one run.

Starts an embedded redis-server, `mixscore serve` and fit workers on 127.0.0.1:

* queue overhead: wall time of a tiny fit job (submit over HTTP, a worker fits and
  stores the version, the client sees `succeeded`) divided by the same fit called
  directly in this process;
* throughput: tiny jobs per second with 1 and with 2 workers.

Run:  python loadtests/bench_jobs.py [--jobs N]
It prints figures (no goal was set for them); loopback only, bounded by --jobs.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import ExitStack, contextmanager
from datetime import datetime
from pathlib import Path

import httpx

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from core import Mixture, fit
from service.embedded import EmbeddedRedis, free_port

FIT = {"components": 2, "restarts": 1, "seed": 3}
POLL_S = 0.002


@contextmanager
def process(command: list[str], env: dict[str, str]) -> Iterator[None]:
    child = subprocess.Popen(command, env=env, stdout=subprocess.DEVNULL,
                             stderr=subprocess.DEVNULL)
    try:
        yield
    finally:
        child.terminate()
        child.wait(30)


def wait_done(http: httpx.Client, job_id: str) -> dict[str, str]:
    while True:
        job = http.get(f"/v1/jobs/{job_id}").json()
        if job["state"] in ("succeeded", "failed"):
            return job  # type: ignore[no-any-return]
        time.sleep(POLL_S)


def _at(stamp: str) -> float:
    return datetime.fromisoformat(stamp.replace("Z", "+00:00")).timestamp()


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--jobs", type=int, default=100, help="tiny jobs per throughput run")
    parser.add_argument("--rounds", type=int, default=15, help="jobs timed for the overhead")
    args = parser.parse_args()
    X = Mixture([0.5, 0.5], [[0.0, 0.0], [5.0, 5.0]], [1.0, 1.0], "spherical").sample(
        200, seed=1)[0]
    body = {"points": X.tolist(), **FIT}
    fit(X, **FIT)
    direct = statistics.median(
        _timed(lambda: fit(X, **FIT)) for _ in range(args.rounds))

    results = {}
    for workers in (1, 2):
        with tempfile.TemporaryDirectory(prefix="mixscore-bench-") as folder, ExitStack() as stack:
            redis = EmbeddedRedis(Path(folder) / "redis")
            env = {**os.environ, "MIXSCORE_REDIS_URL": redis.start()}
            stack.callback(redis.stop)
            port = free_port()
            stack.enter_context(process([sys.executable, "-m", "service.cli", "serve",
                                         "--port", str(port)], env))
            for _ in range(workers):
                stack.enter_context(process([sys.executable, "-m", "service.cli", "worker"],
                                            env))
            http = stack.enter_context(httpx.Client(base_url=f"http://127.0.0.1:{port}"))
            _wait_ready(http)
            if workers == 1:
                walls, waits, runs = [], [], []
                for _ in range(args.rounds):
                    start = time.perf_counter()
                    job = http.post("/v1/models/tiny/fits", json=body).json()
                    done = wait_done(http, job["id"])
                    walls.append(time.perf_counter() - start)
                    waits.append(_at(done["started_at"]) - _at(done["created_at"]))
                    runs.append(_at(done["finished_at"]) - _at(done["started_at"]))
                results["wall"] = statistics.median(walls)
                results["wait"] = statistics.median(waits)
                results["run"] = statistics.median(runs)
            start = time.perf_counter()
            ids = [http.post("/v1/models/tiny/fits", json=body).json()["id"]
                   for _ in range(args.jobs)]
            for job_id in ids:
                wait_done(http, job_id)
            results[f"rate{workers}"] = args.jobs / (time.perf_counter() - start)

    print(f"tiny fit (200 rows, 2 features, 2 components, 1 restart) called directly: "
          f"{direct * 1e3:.1f} ms")
    print(f"the same as a job through HTTP and a worker:                     "
          f"{results['wall'] * 1e3:.1f} ms  (queue overhead ratio {results['wall'] / direct:.2f})")
    print(f"  of which queued -> started {results['wait'] * 1e3:.0f} ms, started -> stored "
          f"{results['run'] * 1e3:.0f} ms (job timestamps, millisecond resolution)")
    print(f"tiny jobs per second, 1 worker:  {results['rate1']:.1f}")
    print(f"tiny jobs per second, 2 workers: {results['rate2']:.1f}")
    return 0


def _timed(call: object) -> float:
    start = time.perf_counter()
    call()  # type: ignore[operator]
    return time.perf_counter() - start


def _wait_ready(http: httpx.Client) -> None:
    for _ in range(300):
        try:
            if http.get("/readyz").status_code == 200:
                return
        except httpx.HTTPError:
            pass
        time.sleep(0.1)
    raise RuntimeError("mixscore serve did not become ready")


if __name__ == "__main__":
    sys.exit(main())
