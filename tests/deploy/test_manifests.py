"""deploy/: the compose file and the Kubernetes manifests pass their published schemas,
and every probe, port and scrape target names what the app really serves."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path
from typing import Any

import kubernetes_validate
import pytest
import yaml

from service.app import create_app
from service.settings import Settings

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
MANIFESTS = ["configmap.yaml", "secret.yaml", "api.yaml", "worker.yaml"]
#: The Kubernetes release whose schemas (bundled in kubernetes-validate) we check against.
KUBERNETES_VERSION = "1.33.0"


def documents(name: str) -> list[dict[str, Any]]:
    return [doc for doc in yaml.safe_load_all((DEPLOY / "k8s" / name).read_text()) if doc]


def resource(kind: str, name: str) -> dict[str, Any]:
    for file in MANIFESTS:
        for doc in documents(file):
            if doc["kind"] == kind and doc["metadata"]["name"] == name:
                return doc
    raise AssertionError(f"no {kind} {name}")


def dockerfile_env() -> dict[str, str]:
    """The ENV of the Dockerfile's final stage (one `ENV a=b \\` block)."""
    text = (DEPLOY / "Dockerfile").read_text().replace("\\\n", " ")
    env_line = [line for line in text.splitlines() if line.startswith("ENV ")][-1]
    return dict(pair.split("=", 1) for pair in env_line.split()[1:])


def validate_compose(path: Path) -> subprocess.CompletedProcess[str]:
    """check-jsonschema with the Compose Specification schema it ships."""
    return subprocess.run([sys.executable, "-m", "check_jsonschema", "--builtin-schema",
                           "vendor.compose-spec", str(path)], capture_output=True, text=True)


def test_the_compose_file_follows_the_compose_specification(tmp_path: Path) -> None:
    result = validate_compose(DEPLOY / "compose.yaml")
    assert result.returncode == 0, result.stdout + result.stderr
    # The validator is not vacuous: a misspelt service key fails.
    broken = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
    broken["services"]["api"]["replica"] = 2
    (tmp_path / "compose.yaml").write_text(yaml.safe_dump(broken))
    assert validate_compose(tmp_path / "compose.yaml").returncode != 0


@pytest.mark.parametrize("name", MANIFESTS)
def test_each_manifest_follows_the_kubernetes_schemas(name: str) -> None:
    for doc in documents(name):
        kubernetes_validate.validate(doc, KUBERNETES_VERSION, strict=True)


def test_the_dask_overlay_follows_the_schemas_and_points_at_its_scheduler() -> None:
    docs = [doc for doc in yaml.safe_load_all((DEPLOY / "k8s" / "dask" / "dask.yaml").read_text())
            if doc]
    for doc in docs:
        kubernetes_validate.validate(doc, KUBERNETES_VERSION, strict=True)
    overlay = yaml.safe_load((DEPLOY / "k8s" / "dask" / "kustomization.yaml").read_text())
    assert overlay["resources"] == ["..", "dask.yaml"]
    service = next(doc for doc in docs if doc["kind"] == "Service")
    address = f"tcp://{service['metadata']['name']}:{service['spec']['ports'][0]['port']}"
    setting = yaml.safe_load(overlay["patches"][0]["patch"])
    assert {"op": "add", "path": "/data/MIXSCORE_DASK_SCHEDULER", "value": address} in setting
    worker = next(doc for doc in docs if doc["metadata"]["name"] == "mixscore-dask-worker")
    assert address in container(worker)["args"]
    result = validate_compose(DEPLOY / "compose.dask.yaml")
    assert result.returncode == 0, result.stdout + result.stderr
    compose = yaml.safe_load((DEPLOY / "compose.dask.yaml").read_text())
    assert compose["services"]["worker"]["environment"]["MIXSCORE_DASK_SCHEDULER"] == \
        "tcp://dask-scheduler:8786"


def test_the_sentinel_override_follows_the_specification_and_names_its_sentinels() -> None:
    result = validate_compose(DEPLOY / "compose.sentinel.yaml")
    assert result.returncode == 0, result.stdout + result.stderr
    compose = yaml.safe_load((DEPLOY / "compose.sentinel.yaml").read_text())
    sentinels = sorted(name for name in compose["services"] if name.startswith("sentinel-"))
    settings = Settings.from_env(compose["services"]["api"]["environment"])
    assert settings.redis_mode == "sentinel"
    assert [item.split(":")[0] for item in settings.redis_sentinels.split(",")] == sentinels
    script = compose["services"]["sentinel-1"]["command"][2]
    assert f"sentinel monitor {settings.redis_sentinel_primary} redis 6379 2" in script
    assert compose["services"]["worker"]["environment"] == \
        compose["services"]["api"]["environment"]
    replicas = [name for name in compose["services"] if name.startswith("redis-replica-")]
    assert len(replicas) == 2 and settings.min_replicas == 1


def test_the_sentinel_overlay_follows_the_schemas_and_names_its_sentinels() -> None:
    docs = [doc for doc in yaml.safe_load_all(
        (DEPLOY / "k8s" / "sentinel" / "redis.yaml").read_text()) if doc]
    for doc in docs:
        kubernetes_validate.validate(doc, KUBERNETES_VERSION, strict=True)
    overlay = yaml.safe_load((DEPLOY / "k8s" / "sentinel" / "kustomization.yaml").read_text())
    assert overlay["resources"] == ["..", "redis.yaml"]
    patch = yaml.safe_load(overlay["patches"][0]["patch"])
    settings = Settings.from_env({op["path"].rsplit("/", 1)[1]: op["value"] for op in patch})
    assert settings.redis_mode == "sentinel" and settings.min_replicas == 1
    sentinels = next(doc for doc in docs if doc["kind"] == "StatefulSet"
                     and doc["metadata"]["name"] == "mixscore-sentinel")
    service = sentinels["spec"]["serviceName"]
    port = container(sentinels)["ports"][0]["containerPort"]
    assert settings.redis_sentinels.split(",") == [
        f"{sentinels['metadata']['name']}-{i}.{service}:{port}"
        for i in range(sentinels["spec"]["replicas"])]
    script = container(sentinels)["command"][2]
    assert f"sentinel monitor {settings.redis_sentinel_primary} $primary 6379 2" in script
    servers = next(doc for doc in docs if doc["metadata"]["name"] == "mixscore-redis"
                   and doc["kind"] == "StatefulSet")
    # Two replicas besides the primary: one is left to confirm writes after a failover.
    assert servers["spec"]["replicas"] == 3
    assert "mixscore-redis-0.mixscore-redis" in script


def test_the_strict_schemas_catch_a_misplaced_field() -> None:
    deployment = resource("Deployment", "mixscore-api")
    deployment["spec"]["template"]["spec"]["containers"][0]["livenessprobe"] = {}
    with pytest.raises(kubernetes_validate.ValidationError):
        kubernetes_validate.validate(deployment, KUBERNETES_VERSION, strict=True)


def test_kustomize_lists_every_manifest() -> None:
    kustomization = yaml.safe_load((DEPLOY / "k8s" / "kustomization.yaml").read_text())
    assert sorted(kustomization["resources"]) == sorted(MANIFESTS)
    assert sorted(p.name for p in (DEPLOY / "k8s").glob("*.yaml")) == sorted(
        [*MANIFESTS, "kustomization.yaml"])


def container(deployment: dict[str, Any]) -> dict[str, Any]:
    containers = deployment["spec"]["template"]["spec"]["containers"]
    assert len(containers) == 1
    return containers[0]  # type: ignore[no-any-return]


def test_api_probes_and_ports_match_the_app(settings: Settings) -> None:
    served = {route.path for route in create_app(settings).routes}
    settings_map = resource("ConfigMap", "mixscore-settings")["data"]
    api = resource("Deployment", "mixscore-api")
    main = container(api)
    ports = {port["name"]: port["containerPort"] for port in main["ports"]}
    assert ports["http"] == int(settings_map["MIXSCORE_PORT"]) == int(
        dockerfile_env()["MIXSCORE_PORT"])
    assert main["livenessProbe"]["httpGet"] == {"path": "/healthz", "port": "http"}
    assert main["readinessProbe"]["httpGet"] == {"path": "/readyz", "port": "http"}
    assert main["startupProbe"]["httpGet"]["path"] == "/healthz"
    assert {"/healthz", "/readyz", "/metrics"} <= served
    annotations = api["spec"]["template"]["metadata"]["annotations"]
    assert int(annotations["prometheus.io/port"]) == ports["http"]
    assert annotations["prometheus.io/path"] == "/metrics"
    service = resource("Service", "mixscore-api")
    assert service["spec"]["ports"][0]["targetPort"] == "http"
    # The keys file the settings name is the one the Secret is mounted as.
    mount = next(m for m in main["volumeMounts"] if m["name"] == "api-keys")
    assert settings_map["MIXSCORE_API_KEYS_FILE"] == f"{mount['mountPath']}/api-keys.json"


def test_worker_probe_is_its_metrics_port() -> None:
    settings_map = resource("ConfigMap", "mixscore-settings")["data"]
    worker = container(resource("Deployment", "mixscore-worker"))
    port = int(settings_map["MIXSCORE_WORKER_METRICS_PORT"])
    assert worker["ports"] == [{"name": "metrics", "containerPort": port}]
    assert worker["livenessProbe"]["httpGet"]["port"] == "metrics"
    assert int(dockerfile_env()["MIXSCORE_WORKER_METRICS_PORT"]) == port


def test_selectors_autoscaler_and_budgets_point_at_the_deployments() -> None:
    for name in ("mixscore-api", "mixscore-worker"):
        deployment = resource("Deployment", name)
        labels = deployment["spec"]["template"]["metadata"]["labels"]
        selector = deployment["spec"]["selector"]["matchLabels"]
        assert selector.items() <= labels.items()
        budget = resource("PodDisruptionBudget", name)
        assert budget["spec"]["selector"]["matchLabels"] == selector
    assert resource("Service", "mixscore-api")["spec"]["selector"] == resource(
        "Deployment", "mixscore-api")["spec"]["selector"]["matchLabels"]
    target = resource("HorizontalPodAutoscaler", "mixscore-api")["spec"]["scaleTargetRef"]
    assert (target["kind"], target["name"]) == ("Deployment", "mixscore-api")


def test_compose_and_prometheus_agree_on_ports() -> None:
    compose = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
    env = dockerfile_env()
    scrape = yaml.safe_load((DEPLOY / "prometheus" / "prometheus.yml").read_text())
    ports = {job["job_name"]: job["dns_sd_configs"][0]["port"] for job in scrape["scrape_configs"]}
    assert ports == {"mixscore-api": int(env["MIXSCORE_PORT"]),
                     "mixscore-worker": int(env["MIXSCORE_WORKER_METRICS_PORT"])}
    assert set(compose["services"]) >= {"redis", "api", "worker", "prometheus", "grafana"}
    assert compose["services"]["api"]["deploy"]["replicas"] == 2
    assert compose["services"]["worker"]["deploy"]["replicas"] == 2
    assert "--appendonly" in compose["services"]["redis"]["command"]
    worker_check = " ".join(compose["services"]["worker"]["healthcheck"]["test"])
    assert f":{env['MIXSCORE_WORKER_METRICS_PORT']}/metrics" in worker_check

