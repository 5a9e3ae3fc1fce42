"""Writes confirmed by replicas (MIXSCORE_REDIS_MIN_REPLICAS), on real servers: a primary
with one replica, and a Cluster of 3 primaries with a replica each (tests/topologies.py).
A replica is hung with SIGSTOP, so the primary takes writes that no replica confirms:
each such write must answer 503 not-replicated, and its repeat with the same
Idempotency-Key, once the replica is back, must confirm it without writing it twice."""

from __future__ import annotations

import signal
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import numpy as np
import redis

from core import Mixture
from service.client import Client

from ..topologies import Topology, cluster, replicated
from .servers import api_process
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
