"""Every Prometheus metric, defined once. Labels are bounded: route templates, methods,
statuses, model names and fixed event names, never values from request bodies.

With several worker processes, PROMETHEUS_MULTIPROC_DIR must be set before Python
starts (``mixscore serve --workers N`` does it); each scrape then merges the files.
"""

from __future__ import annotations

import os
import time
from typing import Any

import numpy as np
from litestar.types import ASGIApp, Message, Receive, Scope, Send
from prometheus_client import (
    CONTENT_TYPE_LATEST,
    REGISTRY,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    generate_latest,
)
from prometheus_client.multiprocess import MultiProcessCollector

#: From a fraction of a millisecond (one cached point) to seconds (a large batch).
LATENCY_BUCKETS_S = (0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0,
                     2.5, 5.0, 10.0)

REQUEST_DURATION = Histogram(
    "mixscore_http_request_duration_seconds", "Time to answer an HTTP request.",
    ["route", "method", "status"], buckets=LATENCY_BUCKETS_S)
POINTS_SCORED = Counter(
    "mixscore_points_scored_total", "Points scored, by model and endpoint.", ["model", "endpoint"])
CACHE_EVENTS = Counter(
    "mixscore_model_cache_events_total", "Compiled-model cache hits, misses, evictions and "
    "invalidations.", ["event"])
LOG_DENSITY_DRIFT = Gauge(
    "mixscore_log_density_drift", "Rolling mean log-density of scored complete rows minus "
    "the mean over the training rows; well below 0 means live data left the training "
    "distribution.", ["model", "version"], multiprocess_mode="livemostrecent")

# Exported by fit workers, each on its own port (MIXSCORE_WORKER_METRICS_PORT).
FIT_JOBS = Counter(
    "mixscore_fit_jobs_total", "Fit job runs that ended, by outcome (succeeded, failed, "
    "cancelled, handed_back).", ["state"])
FIT_DURATION = Histogram(
    "mixscore_fit_duration_seconds", "Wall time of one fit run in a worker.",
    buckets=(0.01, 0.05, 0.1, 0.5, 1.0, 5.0, 10.0, 30.0, 60.0, 300.0, 900.0, 3600.0))
JOBS_WAITING = Gauge(
    "mixscore_jobs_waiting", "Jobs queued and not yet taken by a worker, as last seen by this "
    "worker.", multiprocess_mode="livemax")

#: Weight of one scored row in the drift's rolling mean: about the last 1000 rows count.
DRIFT_ROW_WEIGHT = 1e-3


def labelled(metric: Any, *labels: str) -> Any:
    """The metric's child for these label values, looked up once: ``labels()`` costs
    more than scoring a point."""
    key = (id(metric), labels)
    child = _children.get(key)
    if child is None:
        child = _children[key] = metric.labels(*labels)
    return child


_children: dict[tuple[int, tuple[str, ...]], Any] = {}


class DriftTracker:
    """Exponentially weighted mean log-density of scored rows, per (model, version)."""

    def __init__(self) -> None:
        self._means: dict[tuple[str, int], float] = {}

    def observe(self, model: str, version: int, log_densities: Any,
                training_mean: float) -> None:
        finite = log_densities[np.isfinite(log_densities)]
        if finite.size == 0:
            return
        key = (model, version)
        batch_mean = float(finite.mean())
        previous = self._means.get(key)
        if previous is None:
            mean = batch_mean
        else:  # n rows at once move the mean as n single updates would, to first order
            share = 1.0 - (1.0 - DRIFT_ROW_WEIGHT) ** finite.size
            mean = previous + share * (batch_mean - previous)
        self._means[key] = mean
        LOG_DENSITY_DRIFT.labels(model, str(version)).set(mean - training_mean)


DRIFT = DriftTracker()


def exposition() -> tuple[bytes, str]:
    """The text exposition of this process, or of all processes in multiprocess mode."""
    if os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        registry = CollectorRegistry()
        MultiProcessCollector(registry)
        return generate_latest(registry), CONTENT_TYPE_LATEST
    return generate_latest(REGISTRY), CONTENT_TYPE_LATEST


def timing_middleware(app: ASGIApp) -> ASGIApp:
    """Observe the duration of every routed request, labelled by its route template."""

    async def middleware(scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await app(scope, receive, send)
            return
        start = time.perf_counter()
        status = 500

        async def send_and_note(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
            await send(message)

        try:
            await app(scope, receive, send_and_note)
        finally:
            labelled(REQUEST_DURATION, scope.get("path_template") or "unmatched",
                     str(scope.get("method", "")), str(status)).observe(
                time.perf_counter() - start)

    return middleware
