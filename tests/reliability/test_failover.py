"""A Redis primary killed or hung under load, on real deployments (tests/topologies.py):
a Cluster of 3 primaries with 2 replicas each (the primary that holds the model, or the
one that holds ``{jobs}``) and a primary with 2 replicas behind 3 Sentinels. Two
replicas, so that the promoted one still has a replica to confirm writes
(MIXSCORE_REDIS_MIN_REPLICAS is 1 in both modes). While `mixscore serve` scores, imports
versions and promotes them and a worker runs a fit job, the primary gets SIGKILL (dead)
or SIGSTOP (hung: connections open, no answers). Measured and printed (`pytest -s`):
scoring requests failed (goal 0), seconds until writes succeed again, acknowledged
versions and promotions lost, and the fit job's runs."""

from __future__ import annotations

import signal
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import pytest
import redis

from core import Mixture

from ..service.servers import api_process, worker_process
from ..service.wire import mixture_body
from ..topologies import Topology, cluster, sentinels

MODEL = Mixture([0.5, 0.5], [[0.0, 0.0], [5.0, 1.0]], [[1.0, 1.0], [2.0, 0.5]], "diagonal")
BEFORE_S, AFTER_S = 2.0, 8.0
#: The load goes on past AFTER_S until writes are back, for this long after the fault
#: at most: in one CI run under load they came back, then were refused again (WAIT
#: unconfirmed) past AFTER_S; the servers' logs (server.log) now say why next time.
WRITES_BACK_S = 30.0


@contextmanager
def deployment(kind: str, folder: Path) -> Iterator[tuple[dict[str, str], Topology]]:
    """Settings and servers of a deployment of that kind."""
    if kind == "cluster":
        with cluster(folder, replicas=2) as nodes:
            yield ({"MIXSCORE_REDIS_MODE": "cluster",
                    "MIXSCORE_REDIS_URL": f"redis://127.0.0.1:{nodes.ports[0]}/0"}, nodes)
        return
    with sentinels(folder, replicas=2) as servers:
        yield ({"MIXSCORE_REDIS_MODE": "sentinel", "MIXSCORE_REDIS_URL": "redis://x:1/0",
                "MIXSCORE_REDIS_SENTINELS": ",".join(f"127.0.0.1:{port}"
                                                     for port in servers.ports[-3:]),
                "MIXSCORE_REDIS_SENTINEL_PRIMARY": "mixscore"}, servers)


def primary_holding(nodes: Topology, kind: str, key: str) -> int:
    """The port of the primary that holds ``key``."""
    if kind == "sentinel":
        return nodes.ports[0]
    with redis.RedisCluster(host="127.0.0.1", port=nodes.ports[0]) as client:
        return int(client.get_node_from_key(key).port)


class Load:
    """Scoring, imports and promotions in threads, each noting what it saw."""

    def __init__(self, url: str) -> None:
        self.url = url
        self.stop = threading.Event()
        self.scored = self.score_failures = self.server_errors = 0
        self.score_errors: list[str] = []  # what the first failures said
        self.imported: list[int] = []  # acknowledged version numbers
        self.promoted: list[int] = []  # acknowledged serving versions
        self.write_failures: list[float] = []  # when a write failed
        self.write_successes: list[float] = []
        self.points = MODEL.sample(100, seed=1)[0].tolist()

    def score(self) -> None:
        with httpx.Client(base_url=self.url, timeout=10) as client:
            while not self.stop.is_set():
                try:
                    answer = client.post("/v1/models/plant/log-density",
                                         json={"points": self.points})
                    ok = answer.status_code == 200
                    said = f"{answer.status_code} {answer.text[:200]}"
                except httpx.HTTPError as error:
                    ok, said = False, repr(error)
                if not ok and len(self.score_errors) < 3:
                    self.score_errors.append(said)
                self.scored += 1
                self.score_failures += not ok
                self.server_errors += said.startswith("500")

    def write(self) -> None:
        with httpx.Client(base_url=self.url, timeout=10) as client:
            while not self.stop.is_set():
                try:
                    made = client.post("/v1/models/plant/versions",
                                       json=mixture_body(MODEL, serve=False))
                    if made.status_code == 201:
                        number = made.json()["version"]
                        self.imported.append(number)
                        served = client.put("/v1/models/plant/serving",
                                            json={"version": number})
                        if served.status_code == 200:
                            self.promoted.append(number)
                    ok = made.status_code == 201
                except httpx.HTTPError:
                    ok = False
                (self.write_successes if ok else self.write_failures).append(time.monotonic())
                time.sleep(0.02)

    def writes_back(self, fault_at: float) -> float | None:
        """Seconds from the fault to the first write that succeeded after the last
        one that failed; None while writes still fail."""
        last_failure = max((t for t in self.write_failures if t > fault_at), default=fault_at)
        return min((t - fault_at for t in self.write_successes if t > last_failure),
                   default=None)


@pytest.mark.parametrize(("kind", "holding", "fault"), [
    ("cluster", "model", signal.SIGKILL), ("cluster", "model", signal.SIGSTOP),
    ("cluster", "jobs", signal.SIGKILL),
    ("sentinel", "everything", signal.SIGKILL), ("sentinel", "everything", signal.SIGSTOP)],
    ids=["cluster-model-killed", "cluster-model-hung", "cluster-jobs-killed",
         "sentinel-killed", "sentinel-hung"])
def test_a_failed_primary_loses_nothing_acknowledged(
        kind: str, holding: str, fault: signal.Signals, tmp_path: Path,
        key_prefix: str) -> None:
    X, _ = MODEL.sample(40_000, seed=2)
    key = {"model": f"{key_prefix}:{{plant}}:model", "jobs": f"{key_prefix}:{{jobs}}:stream",
           "everything": ""}[holding]
    with deployment(kind, tmp_path) as (settings, nodes), \
            api_process(settings["MIXSCORE_REDIS_URL"], key_prefix,
                        log_file=tmp_path / "api.log", **settings) as url, \
            httpx.Client(base_url=url, timeout=10) as api:
        assert api.post("/v1/models/plant/versions", json=mixture_body(MODEL)).status_code == 201
        job = api.post("/v1/models/fitted/fits", json={
            "points": X.tolist(), "components": 4, "structure": "full", "restarts": 4,
            "tolerance": 1e-9, "max_iterations": 60, "seed": 3}).json()
        load = Load(url)
        threads = [threading.Thread(target=load.score, daemon=True) for _ in range(2)]
        threads.append(threading.Thread(target=load.write, daemon=True))
        with worker_process(settings["MIXSCORE_REDIS_URL"], key_prefix, **settings):
            try:
                for thread in threads:
                    thread.start()
                time.sleep(BEFORE_S)
                victim = primary_holding(nodes, kind, key)
                killed_at = time.monotonic()
                nodes.processes[victim].send_signal(fault)
                time.sleep(AFTER_S)
                while (load.writes_back(killed_at) is None
                       and time.monotonic() < killed_at + WRITES_BACK_S):
                    time.sleep(0.2)
            finally:
                load.stop.set()
                for thread in threads:
                    thread.join(30)
            deadline = time.monotonic() + 120
            while (done := api.get(f"/v1/jobs/{job['id']}").json())["state"] not in (
                    "succeeded", "failed"):
                assert time.monotonic() < deadline, done
                time.sleep(0.5)
        stored = {number for number in load.imported
                  if api.get(f"/v1/models/plant/versions/{number}").status_code == 200}
        serving = api.get("/v1/models/plant").json()["serving_version"]
        fitted = api.get("/v1/models/fitted").json()
    back = load.writes_back(killed_at)
    lost = sorted(set(load.imported) - stored)
    failed = sum(t > killed_at for t in load.write_failures)
    print(f"\n{kind}, primary holding {holding} {fault.name}: {load.scored} scoring requests, "
          f"{load.score_failures} failed {load.score_errors}; "
          f"{failed} writes refused, writes back "
          f"{'never' if back is None else f'{back:.1f} s'} after the kill; "
          f"{len(load.imported)} versions acknowledged, lost {lost}; serving {serving}, last "
          f"acknowledged promotion {load.promoted[-1:]}; fit job {done['state']} after "
          f"{done['attempts']} run(s), {len(fitted['versions'])} version(s)")
    # Never a 500; the goal for 503s is 0, met in most runs, but a failover can still
    # cost a request or two where an API process has no compiled version to fall back on
    # (README, Reliability).
    log = (tmp_path / "api.log").read_text().splitlines()
    logged = [line for line in log if '"level":"ERROR"' in line]
    assert not load.server_errors and not logged, logged[:3]
    assert load.score_failures <= 2, (load.score_errors,
                                      [line for line in log if "fall back" in line][:3])
    if load.score_failures:  # what the cache said, for the record (pytest -s)
        print([line for line in log if "fall back" in line][:3])
    assert back is not None, f"writes not back {WRITES_BACK_S} s after the fault"
    assert done["state"] == "succeeded" and len(fitted["versions"]) == 1
    assert not lost, f"acknowledged versions lost: {lost}"
    assert serving >= load.promoted[-1]
