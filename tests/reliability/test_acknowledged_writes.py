"""An acknowledged write survives the failover of its primary, on a real Redis Cluster
(3 primaries with one replica each, tests/topologies.py).

A client writes in a loop, one kind of writes a test: imports, serving changes and
deletions of a model; chunks of a dataset; fit jobs queued and cancelled. The replica of
the primary that owns the written slot is stopped
(SIGSTOP) for the last 0.8 s, then that primary is killed and the replica resumed, so it
is promoted without the writes of the stall, and with no replica of its own. So no write
sent from the stall on can be confirmed by a replica, and none may be acknowledged: WAIT
must run on the connection that wrote, also when that connection breaks under it; and
every write acknowledged before must be in the promoted replica's data. Printed
(`pytest -s`): writes acknowledged from the stall on and acknowledged changes lost (goal
0 for both), for the README's reliability section."""

from __future__ import annotations

import hashlib
import hmac
import signal
import threading
import time
from pathlib import Path

import httpx
import pytest
import redis

from core import Mixture

from ..service.servers import api_process
from ..service.wire import mixture_body
from ..topologies import cluster, wait_until


def named(route: str, key: str) -> str:
    """A request key as the service names it (service/state.py, request_key: an HMAC of
    the route and the header under the caller's key digest, none here); a dataset's id
    is its first 24 digits."""
    return hmac.new(b"", f"{route}\0{key}".encode(), hashlib.sha256).hexdigest()

MODEL = Mixture([0.5, 0.5], [[0.0, 0.0], [5.0, 1.0]], [[1.0, 1.0], [2.0, 0.5]], "diagonal")
#: Versions the serving pointer cycles through; the loop's imports come after them.
CYCLED = 5
STALL_S = 0.8


class Writes:
    """One kind of writes in a loop, and what the API acknowledged (times from
    time.monotonic)."""

    #: The Redis key (under the prefix) whose slot owner fails.
    key = ""
    def owns(self, tag: str) -> bool:
        slot = redis.crc.key_slot(tag.encode())
        return any(first <= slot <= last for first, last in self.owned)

    def __init__(self, url: str, key_prefix: str) -> None:
        self.url = url
        self.prefix = key_prefix
        self.stop = threading.Event()
        self.answers: list[tuple[float, float, int]] = []  # (sent, answered, status)
        self.acknowledged: dict[str, int] = {}  # kind of write -> count
        self.refused = 0

    def prepare(self, api: httpx.Client) -> None:
        """What exists before the loop."""

    def step(self, api: httpx.Client, step: int) -> None:
        raise NotImplementedError

    def lost(self, promoted: redis.Redis) -> list[tuple[str, object]]:
        """The acknowledged changes that the promoted replica does not hold."""
        raise NotImplementedError

    def run(self) -> None:
        with httpx.Client(base_url=self.url, timeout=15) as api:
            step = 0
            while not self.stop.is_set():
                step += 1
                self.step(api, step)

    def send(self, kind: str, method: object, path: str, **options: object
             ) -> httpx.Response | None:
        """The answer if 2xx; None (counted) if refused; a 500 fails the test."""
        sent = time.monotonic()
        try:
            answer: httpx.Response = method(path, **options)  # type: ignore[operator]
        except httpx.HTTPError:
            self.refused += 1
            return None
        self.answers.append((sent, time.monotonic(), answer.status_code))
        assert answer.status_code < 500 or answer.status_code == 503, answer.text
        if answer.status_code >= 300:
            self.refused += 1
            return None
        self.acknowledged[kind] = self.acknowledged.get(kind, 0) + 1
        return answer


class ModelWrites(Writes):
    """Imports, serving changes and deletions of one model."""

    key = "{plant}:model"

    def prepare(self, api: httpx.Client) -> None:
        for _ in range(CYCLED):
            assert api.post("/v1/models/plant/versions",
                            json=mixture_body(MODEL)).status_code == 201
        self.imported: list[int] = []
        self.deleted: list[int] = []
        self.attempted_deletions: set[int] = set()
        self.promoted: list[tuple[float, int]] = []  # (sent, version)
        self.attempted_promotions: list[tuple[float, int]] = []

    def step(self, api: httpx.Client, step: int) -> None:
        created = self.send("imports", api.post, "/v1/models/plant/versions",
                            json=mixture_body(MODEL),
                            headers={"Idempotency-Key": f"import-{step}"})
        if created is not None:
            self.imported.append(created.json()["version"])
        version = step % CYCLED + 1
        sent = time.monotonic()
        self.attempted_promotions.append((sent, version))
        if self.send("serving changes", api.put, "/v1/models/plant/serving",
                     json={"version": version}) is not None:
            self.promoted.append((sent, version))
        if created is not None:
            number = created.json()["version"]
            self.attempted_deletions.add(number)
            if self.send("deletions", api.delete,
                         f"/v1/models/plant/versions/{number}") is not None:
                self.deleted.append(number)

    def lost(self, promoted: redis.Redis) -> list[tuple[str, object]]:
        serving = int(promoted.hget(f"{self.prefix}:{{plant}}:model", "serving"))
        stored = {int(v) for v in promoted.zrange(f"{self.prefix}:{{plant}}:versions", 0, -1)}
        # A deletion refused (503) may still have been stored and replicated.
        lost: list[tuple[str, object]] = [
            ("import", v) for v in self.imported
            if v not in stored and v not in self.attempted_deletions]
        lost += [("deletion", v) for v in self.deleted if v in stored]
        last_sent, last = self.promoted[-1]
        later = {v for sent, v in self.attempted_promotions if sent > last_sent}
        if serving != last and serving not in later:
            lost.append(("serving", last))
        return lost


class DatasetWrites(Writes):
    """Chunks appended to one dataset, and datasets created on the same shard (their
    Idempotency-Keys chosen so that their ids fall in its slots)."""

    def prepare(self, api: httpx.Client) -> None:
        self.dataset = api.post("/v1/datasets", json={"dimension": 2}).json()["id"]
        self.key = f"{{dataset-{self.dataset}}}:chunks"
        self.appended: list[str] = []  # Idempotency-Keys
        self.created: list[str] = []  # dataset ids
        self.rows = MODEL.sample(20, seed=2)[0].tolist()

    def step(self, api: httpx.Client, step: int) -> None:
        key = f"chunk-{step}"
        if self.send("chunks", api.post, f"/v1/datasets/{self.dataset}/chunks",
                     json={"points": self.rows}, headers={"Idempotency-Key": key}) is not None:
            self.appended.append(key)
        key = next(key for key in (f"dataset-{step}-{i}" for i in range(10_000))
                   if self.owns(f"dataset-{named('POST /v1/datasets', key)[:24]}"))
        created = self.send("datasets", api.post, "/v1/datasets", json={"dimension": 2},
                            headers={"Idempotency-Key": key})
        if created is not None:
            self.created.append(created.json()["id"])

    def lost(self, promoted: redis.Redis) -> list[tuple[str, object]]:
        lost: list[tuple[str, object]] = [
            ("dataset", dataset) for dataset in self.created
            if not promoted.exists(f"{self.prefix}:{{dataset-{dataset}}}:dataset")]
        requests = promoted.hgetall(f"{self.prefix}:{{dataset-{self.dataset}}}:requests")
        route = f"POST /v1/datasets/{self.dataset}/chunks"
        return lost + [("chunk", key) for key in self.appended
                       if named(route, key).encode() not in requests]


class JobWrites(Writes):
    """Fit jobs queued and cancelled (no worker runs them)."""

    key = "{jobs}:stream"

    def prepare(self, api: httpx.Client) -> None:
        self.queued: list[str] = []
        self.cancelled: list[str] = []
        self.rows = MODEL.sample(20, seed=3)[0].tolist()

    def step(self, api: httpx.Client, step: int) -> None:
        job = self.send("fit jobs", api.post, "/v1/models/fitted/fits",
                        json={"points": self.rows, "components": 1},
                        headers={"Idempotency-Key": f"job-{step}"})
        if job is None:
            return
        self.queued.append(job.json()["id"])
        if self.send("cancellations", api.delete, f"/v1/jobs/{job.json()['id']}") is not None:
            self.cancelled.append(job.json()["id"])

    def lost(self, promoted: redis.Redis) -> list[tuple[str, object]]:
        states = {job: promoted.hget(f"{self.prefix}:{{jobs}}:job:{job}", "state")
                  for job in self.queued}
        lost: list[tuple[str, object]] = [("job", j) for j, s in states.items() if s is None]
        lost += [("cancellation", j) for j in self.cancelled if states[j] != b"cancelled"]
        return lost


@pytest.mark.parametrize("kind", [ModelWrites, DatasetWrites, JobWrites],
                         ids=["model", "dataset", "job"])
def test_no_acknowledged_write_is_lost_when_the_slot_owner_fails(
        tmp_path: Path, key_prefix: str, kind: type[Writes]) -> None:
    with cluster(tmp_path) as nodes, api_process(
            f"redis://127.0.0.1:{nodes.ports[0]}/0", key_prefix,
            log_file=tmp_path / "server.log", MIXSCORE_REDIS_MODE="cluster",
            MIXSCORE_REDIS_REPLICA_TIMEOUT_S="2") as url:
        writes = kind(url, key_prefix)
        with httpx.Client(base_url=url, timeout=10) as api:
            writes.prepare(api)
        with redis.RedisCluster(host="127.0.0.1", port=nodes.ports[0]) as client:
            owner = int(client.get_node_from_key(f"{key_prefix}:{writes.key}").port)
        with redis.Redis(port=owner) as primary:
            replica = int(primary.info("replication")["slave0"]["port"])
            writes.owned = [(int(r[0]), int(r[1])) for r in primary.execute_command(
                "CLUSTER", "SLOTS") if int(r[2][1]) == owner]
        loop = threading.Thread(target=writes.run)
        loop.start()
        try:
            time.sleep(1.5)
            nodes.processes[replica].send_signal(signal.SIGSTOP)
            stalled = time.monotonic()
            time.sleep(STALL_S)
            nodes.processes[owner].kill()
            nodes.processes[owner].wait()
            nodes.processes[replica].send_signal(signal.SIGCONT)
            killed = time.monotonic()
            with redis.Redis(port=replica) as promoted:
                wait_until(lambda: promoted.info("replication")["role"] == "master")
            time.sleep(4.0)  # the loop meets the promoted primary
        finally:
            nodes.processes[replica].send_signal(signal.SIGCONT)
            writes.stop.set()
            loop.join(30)
        with redis.Redis(port=replica) as promoted:
            lost = writes.lost(promoted)
    unconfirmable = [(round(sent - stalled, 2), round(at - stalled, 2), status)
                     for sent, at, status in writes.answers if sent >= stalled and status < 300]
    counts = ", ".join(f"{n} {kind}" for kind, n in writes.acknowledged.items())
    print(f"\ncluster, {counts} acknowledged, {writes.refused} refused; acknowledged from "
          f"the replica's stall on: {len(unconfirmable)} (goal 0); acknowledged changes lost "
          f"at failover: {len(lost)} (goal 0)")
    assert all(writes.acknowledged.get(kind) for kind in writes.acknowledged)
    assert sum(sent >= killed for sent, _, _ in writes.answers) >= 1  # it met the new primary
    assert unconfirmable == [], unconfirmable  # (sent, answered) seconds from the stall
    assert lost == [], lost
