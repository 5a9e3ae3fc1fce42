"""Writes confirmed by replicas (MIXSCORE_REDIS_MIN_REPLICAS), on real servers: a primary
with one replica, and a Cluster of 3 primaries with a replica each (tests/topologies.py).
A replica is hung with SIGSTOP, so the primary takes writes that no replica confirms:
each such write must answer 503 not-replicated, and its repeat with the same
Idempotency-Key, once the replica is back, must confirm it without writing it twice."""

from __future__ import annotations

import signal
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import numpy as np
import redis

from core import Mixture
from service.client import Client

from ..topologies import Topology, cluster, replicated, sentinels
from .servers import api_process, worker_process
from .wire import mixture_body

MODEL = Mixture([0.5, 0.5], [[0.0, 0.0], [5.0, 1.0]], [[1.0, 1.0], [2.0, 0.5]], "diagonal")
#: Short, so a write with no confirmation is answered quickly.
TIMEOUT = {"MIXSCORE_REDIS_REPLICA_TIMEOUT_S": "0.3"}


@contextmanager
def hung(nodes: Topology, port: int) -> Iterator[None]:
    nodes.processes[port].send_signal(signal.SIGSTOP)
    try:
        yield
    finally:
        nodes.processes[port].send_signal(signal.SIGCONT)


def not_replicated(answer: httpx.Response) -> None:
    assert answer.status_code == 503, answer.text
    problem = answer.json()
    assert problem["type"] == "urn:mixscore:problem:not-replicated"
    assert "0 of 1 replicas confirmed" in problem["detail"]
    assert answer.headers["retry-after"] == "1"


def test_unconfirmed_writes_answer_503_and_their_repeats_write_nothing_twice(
        tmp_path: Path, key_prefix: str) -> None:
    with replicated(tmp_path) as nodes, api_process(
            f"redis://127.0.0.1:{nodes.ports[0]}/0", key_prefix,
            MIXSCORE_REDIS_MIN_REPLICAS="1", **TIMEOUT) as url, \
            httpx.Client(base_url=url, timeout=10) as api:
        assert api.post("/v1/models/plant/versions", json=mixture_body(MODEL)).status_code == 201
        dataset = api.post("/v1/datasets", json={"dimension": 2}).json()["id"]
        rows = MODEL.sample(50, seed=1)[0].tolist()
        with hung(nodes, nodes.ports[1]):
            imported = api.post("/v1/models/plant/versions", json=mixture_body(MODEL),
                                headers={"Idempotency-Key": "import-2"})
            not_replicated(imported)
            assert "version 2 of 'plant'" in imported.json()["detail"]
            # Repeated while the replica is still away: the same answer, still one version.
            not_replicated(api.post("/v1/models/plant/versions", json=mixture_body(MODEL),
                                    headers={"Idempotency-Key": "import-2"}))
            not_replicated(api.put("/v1/models/plant/serving", json={"version": 2}))
            not_replicated(api.post(f"/v1/datasets/{dataset}/chunks", json={"points": rows},
                                    headers={"Idempotency-Key": "chunk-1"}))
            not_replicated(api.post("/v1/models/other/fits", json={
                "points": rows, "components": 1}, headers={"Idempotency-Key": "fit-1"}))
            created = api.post("/v1/datasets", json={"dimension": 2},
                               headers={"Idempotency-Key": "dataset-1"})
            not_replicated(created)
        # The replica is back: each repeat confirms the first write.
        again = api.post("/v1/models/plant/versions", json=mixture_body(MODEL),
                         headers={"Idempotency-Key": "import-2"})
        assert again.status_code == 201 and again.json()["version"] == 2
        assert api.put("/v1/models/plant/serving", json={"version": 2}).status_code == 200
        chunk = api.post(f"/v1/datasets/{dataset}/chunks", json={"points": rows},
                         headers={"Idempotency-Key": "chunk-1"})
        assert chunk.status_code == 200 and chunk.json()["rows"] == 50
        job = api.post("/v1/models/other/fits", json={"points": rows, "components": 1},
                       headers={"Idempotency-Key": "fit-1"})
        assert job.status_code == 202
        again = api.post("/v1/datasets", json={"dimension": 2},
                         headers={"Idempotency-Key": "dataset-1"})
        assert again.status_code == 201
        assert f"dataset {again.json()['id']} is stored" in created.json()["detail"]
        model = api.get("/v1/models/plant").json()
        assert [v["version"] for v in model["versions"]] == [1, 2]
        assert model["serving_version"] == 2
        assert len(api.get("/v1/jobs", params={"model": "other"}).json()["jobs"]) == 1
        # What the API acknowledged is on the replica (its own copy, read directly).
        with redis.Redis(port=nodes.ports[1]) as replica:
            assert replica.hget(f"{key_prefix}:{{plant}}:model", "serving") == b"2"
            assert replica.llen(f"{key_prefix}:{{dataset-{dataset}}}:chunks") == 1
            assert np.frombuffer(
                replica.hget(f"{key_prefix}:{{job-{job.json()['id']}}}:data", "points"),
                dtype="<f8").reshape(-1, 2).tolist() == rows


def test_on_a_cluster_a_write_waits_for_the_replicas_of_its_own_shard(
        tmp_path: Path, key_prefix: str) -> None:
    """WAIT must run on the connection that wrote, on the primary that owns the slot: a
    WAIT sent anywhere else would be confirmed by another shard's healthy replica."""
    with cluster(tmp_path) as nodes, \
            redis.RedisCluster(host="127.0.0.1", port=nodes.ports[0]) as client:
        owner = client.get_node_from_key(f"{key_prefix}:{{plant}}:model")
        with redis.Redis(port=owner.port) as primary:
            replica = int(primary.info("replication")["slave0"]["port"])
        elsewhere = next(name for name in (f"model-{i}" for i in range(100))
                         if client.get_node_from_key(f"{key_prefix}:{{{name}}}:model").name
                         != owner.name)
        with api_process(f"redis://127.0.0.1:{nodes.ports[0]}/0", key_prefix,
                         MIXSCORE_REDIS_MODE="cluster", **TIMEOUT) as url, \
                httpx.Client(base_url=url, timeout=10) as api:
            for name in ("plant", elsewhere):  # listed in the model index (on any shard)
                assert api.post(f"/v1/models/{name}/versions",
                                json=mixture_body(MODEL)).status_code == 201
            with hung(nodes, replica):
                not_replicated(api.post("/v1/models/plant/versions", json=mixture_body(MODEL),
                                        headers={"Idempotency-Key": "k"}))
                assert api.post(f"/v1/models/{elsewhere}/versions",
                                json=mixture_body(MODEL)).status_code == 201
            again = api.post("/v1/models/plant/versions", json=mixture_body(MODEL),
                             headers={"Idempotency-Key": "k"})
            assert again.status_code == 201 and again.json()["version"] == 2


def test_the_client_repeats_an_unconfirmed_write_until_the_replicas_confirm_it(
        tmp_path: Path, key_prefix: str) -> None:
    with replicated(tmp_path) as nodes, api_process(
            f"redis://127.0.0.1:{nodes.ports[0]}/0", key_prefix,
            MIXSCORE_REDIS_MIN_REPLICAS="1", **TIMEOUT) as url, Client(url) as client:
        replica = nodes.processes[nodes.ports[1]]
        replica.send_signal(signal.SIGSTOP)
        back = threading.Timer(1.5, replica.send_signal, [signal.SIGCONT])
        back.start()
        try:
            created = client.import_version("plant", mixture_body(MODEL))
        finally:
            back.join()
        assert created.version == 1
        assert [v.version for v in client.model("plant").versions] == [1]


def test_a_fit_result_no_replica_confirms_is_stored_again_until_one_does(
        tmp_path: Path, key_prefix: str) -> None:
    """The worker keeps the job's entry and repeats its writes while the replica is
    away; once it is back, the job succeeds on its first run with one version."""
    settings = {"MIXSCORE_REDIS_MIN_REPLICAS": "1", **TIMEOUT}
    rows = MODEL.sample(2_000, seed=4)[0].tolist()
    with replicated(tmp_path) as nodes, api_process(
            f"redis://127.0.0.1:{nodes.ports[0]}/0", key_prefix, **settings) as url, \
            httpx.Client(base_url=url, timeout=10) as api:
        job = api.post("/v1/models/fitted/fits", json={"points": rows, "components": 2,
                                                       "seed": 1}).json()
        replica = nodes.processes[nodes.ports[1]]
        replica.send_signal(signal.SIGSTOP)
        try:
            with worker_process(f"redis://127.0.0.1:{nodes.ports[0]}/0", key_prefix,
                                until_empty=True, **settings) as worker:
                deadline = time.monotonic() + 60
                while api.get(f"/v1/jobs/{job['id']}").json()["state"] == "queued":
                    assert time.monotonic() < deadline
                    time.sleep(0.2)
                time.sleep(3)  # the fit takes well under that: its result is waiting
                assert api.get(f"/v1/jobs/{job['id']}").json()["state"] == "running"
                replica.send_signal(signal.SIGCONT)
                assert worker.wait(60) == 0
        finally:
            replica.send_signal(signal.SIGCONT)
        done = api.get(f"/v1/jobs/{job['id']}").json()
        assert (done["state"], done["attempts"], done["version"]) == ("succeeded", 1, 1)
        assert [v["version"] for v in api.get("/v1/models/fitted").json()["versions"]] == [1]


def test_after_a_failover_a_lone_replica_leaves_writes_unconfirmed_until_one_returns(
        tmp_path: Path, key_prefix: str) -> None:
    """Why the README asks for two replicas: with one, the replica promoted by a failover
    has none left, so writes answer 503 not-replicated (stored, not lost, and repeatable)
    until the old primary, restarted, rejoins as its replica."""
    with sentinels(tmp_path, replicas=1) as servers, api_process(
            "redis://x:1/0", key_prefix, MIXSCORE_REDIS_MODE="sentinel",
            MIXSCORE_REDIS_SENTINELS=",".join(f"127.0.0.1:{p}" for p in servers.ports[-3:]),
            MIXSCORE_REDIS_SENTINEL_PRIMARY="mixscore", **TIMEOUT) as url, \
            httpx.Client(base_url=url, timeout=10) as api:
        assert api.post("/v1/models/plant/versions", json=mixture_body(MODEL)).status_code == 201
        old = servers.ports[0]
        servers.processes[old].kill()
        servers.processes[old].wait()

        def import_again() -> httpx.Response:
            return api.post("/v1/models/plant/versions", json=mixture_body(MODEL),
                            headers={"Idempotency-Key": "after-the-failover"})

        deadline = time.monotonic() + 60
        while (answer := import_again()).json().get("type", "").endswith(":unavailable"):
            assert time.monotonic() < deadline, answer.text  # the failover itself
            time.sleep(0.2)
        not_replicated(answer)  # a new primary, and no replica of its own
        servers.start(tmp_path / "primary", old, "--repl-diskless-sync", "yes",
                      "--repl-diskless-sync-delay", "0")  # the Sentinels make it a replica
        while (answer := import_again()).status_code != 201:
            assert time.monotonic() < deadline, answer.text
            time.sleep(0.2)
        assert answer.json()["version"] == 2
        assert [v["version"] for v in api.get("/v1/models/plant").json()["versions"]] == [1, 2]


def test_a_write_script_sent_to_a_replica_is_an_outage_not_a_500(
        tmp_path: Path, key_prefix: str) -> None:
    """What a Sentinel failover does to a connection still open to the old primary, now a
    replica: its write scripts fail with READONLY (redis-py reconnects only after a plain
    command's). The answer is 503 with Retry-After, never a 500; reads still work."""
    with replicated(tmp_path) as nodes, api_process(
            f"redis://127.0.0.1:{nodes.ports[1]}/0", key_prefix) as url, \
            httpx.Client(base_url=url, timeout=10) as api:
        for refused in (api.post("/v1/models/plant/versions", json=mixture_body(MODEL)),
                        api.post("/v1/datasets", json={"dimension": 2})):  # a script first
            assert refused.status_code == 503, refused.text
            assert refused.headers["retry-after"] == "5"
        assert api.get("/v1/models").status_code == 200
