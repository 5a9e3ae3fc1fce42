"""The Grafana dashboard and the alert rules ask only for series the service exports.

The service is started for real (API with Redis, and a fit worker subprocess), driven
through every path that creates a series, and scraped; each query's metric names and
label names must appear in the scrapes."""

from __future__ import annotations

import json
import re
from pathlib import Path
from typing import Any

import yaml
from prometheus_client.parser import text_string_to_metric_families

from service.embedded import EmbeddedRedis, free_port

from .servers import scrape_until, worker_process
from .test_jobs import submit, training, wait_for

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
DASHBOARD = DEPLOY / "grafana" / "dashboards" / "mixscore.json"
#: Labels Prometheus itself adds to every series; `up` is its own per-target series.
PROMETHEUS_LABELS = {"le", "job", "instance"}
PROMETHEUS_SERIES = {"up": {"job", "instance"}}
PROMQL_WORDS = {"sum", "by", "rate", "increase", "histogram_quantile", "max", "le",
                "without", "on", "ignoring", "and", "or", "unless"}


def dashboard_queries() -> list[str]:
    panels = json.loads(DASHBOARD.read_text())["panels"]
    return [target["expr"] for panel in panels for target in panel.get("targets", [])]


def alert_queries() -> list[str]:
    groups = yaml.safe_load((DEPLOY / "prometheus" / "alerts.yml").read_text())["groups"]
    return [rule["expr"] for group in groups for rule in group["rules"]]


def exported(text: str) -> dict[str, set[str]]:
    """Series name -> label names, from one scrape."""
    series: dict[str, set[str]] = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            series.setdefault(sample.name, set()).update(sample.labels)
    return series


def used(expr: str) -> tuple[set[str], set[str]]:
    """Metric names, and label names used in matchers and groupings, of a PromQL query."""
    expr = re.sub(r"\[[^\]]*\]", "", expr)  # range selectors
    expr = re.sub(r'"[^"]*"', '""', expr)  # label values
    labels = set(re.findall(r"(\w+)\s*(?:=~|!~|!=|=)", expr))
    for grouping in re.findall(r"\bby\s*\(([^)]*)\)", expr):
        labels |= {name.strip() for name in grouping.split(",")}
    metrics = set(re.findall(r"\b([a-zA-Z_:][\w:]*)\s*(?:\{|\)|$|\s)", expr))
    metrics -= PROMQL_WORDS | labels
    metrics = {m for m in metrics if not m.isdigit()}
    return metrics, labels


def scrape_everything(client: Any, redis_server: EmbeddedRedis, key_prefix: str) -> dict[
        str, set[str]]:
    model = {"structure": "diagonal", "weights": [0.5, 0.5], "means": [[0, 0], [5, 5]],
             "covariances": [[1, 1], [2, 2]]}
    assert client.post("/v1/models/watched/versions", json=model).status_code == 201
    for _ in range(2):  # a cache miss, then a hit
        client.post("/v1/models/watched/log-density", json={"points": [[0.1, 0.2]]})
    client.post("/v1/models/watched/responsibilities", json={"points": [[0.1, 0.2]]})
    client.get("/v1/models/absent")  # a 4xx series
    job = submit(client, training(300), seed=1)
    port = free_port()
    with worker_process(redis_server.url, key_prefix, MIXSCORE_WORKER_METRICS_PORT=str(port)):
        wait_for(client, job["id"], ("succeeded",))
        # a fitted version has training quantiles, so scoring it moves the drift gauges
        # (the KS distance once a window of MIXSCORE_DRIFT_WINDOW rows is full)
        client.post("/v1/models/plant/log-density?version=1",
                    json={"points": training(1000, seed=2).tolist()})
        worker_text = scrape_until(f"http://127.0.0.1:{port}/metrics",
                                   "mixscore_fit_jobs_total{")
    series = exported(client.get("/metrics").text)
    for name, labels in exported(worker_text).items():
        series.setdefault(name, set()).update(labels)
    for name, labels in PROMETHEUS_SERIES.items():
        series[name] = set(labels)
    return series


def test_every_panel_and_alert_asks_for_exported_series(client: Any, redis_server: EmbeddedRedis,
                                                         key_prefix: str) -> None:
    series = scrape_everything(client, redis_server, key_prefix)
    queries = dashboard_queries() + alert_queries()
    assert len(queries) >= 15
    for expr in queries:
        metrics, labels = used(expr)
        assert metrics, f"no metric found in {expr!r}"
        for metric in metrics:
            assert metric in series, f"{metric} (in {expr!r}) is not exported"
            missing = labels - series[metric] - PROMETHEUS_LABELS
            if metric != "up":
                assert not missing, f"{metric} has no label {missing} (in {expr!r})"


def test_the_checker_catches_a_misspelt_metric() -> None:
    metrics, labels = used('sum by (route) (rate(mixscore_http_request_seconds_count'
                           '{status=~"5.."}[5m]))')
    assert metrics == {"mixscore_http_request_seconds_count"}
    assert labels == {"route", "status"}


def test_the_dashboard_is_one_grafana_can_provision() -> None:
    board = json.loads(DASHBOARD.read_text())
    assert board["uid"] and board["title"] and isinstance(board["schemaVersion"], int)
    datasource = yaml.safe_load(
        (DEPLOY / "grafana" / "provisioning" / "datasources" / "prometheus.yaml").read_text())
    uid = datasource["datasources"][0]["uid"]
    provider = yaml.safe_load(
        (DEPLOY / "grafana" / "provisioning" / "dashboards" / "mixscore.yaml").read_text())
    assert provider["providers"][0]["options"]["path"] == "/var/lib/grafana/dashboards"
    ids = [panel["id"] for panel in board["panels"]]
    assert len(ids) == len(set(ids))
    occupied: set[tuple[int, int]] = set()
    for panel in board["panels"]:
        grid = panel["gridPos"]
        assert grid["x"] + grid["w"] <= 24
        cells = {(grid["x"] + dx, grid["y"] + dy) for dx in range(grid["w"])
                 for dy in range(grid["h"])}
        assert not cells & occupied, f"panel {panel['title']!r} overlaps another"
        occupied |= cells
        if panel["type"] != "row":
            assert panel["datasource"]["uid"] == uid
            assert all(target["datasource"]["uid"] == uid for target in panel["targets"])


def test_the_drift_alert_fires_at_the_ks_critical_value() -> None:
    """The threshold is the 0.001 critical value of the KS distance for the default
    window: checked against scipy.stats.kstwo, the exact null distribution."""
    from scipy import stats

    from service.settings import DEFAULTS

    rule = next(rule for group in yaml.safe_load(
        (DEPLOY / "prometheus" / "alerts.yml").read_text())["groups"]
        for rule in group["rules"] if rule["alert"] == "MixscoreTailFractionsDrifted")
    threshold = float(rule["expr"].split(">")[1])
    false_alarms = stats.kstwo(DEFAULTS["drift_window"]).sf(threshold)
    assert 0.0008 < false_alarms < 0.0011
