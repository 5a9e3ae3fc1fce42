"""Every Prometheus metric, defined once. Labels are bounded: route templates, methods,
statuses, model names and fixed event names, never values from request bodies.

With several worker processes, PROMETHEUS_MULTIPROC_DIR must be set before Python
starts (``mixscore serve --workers N`` does it); each scrape then merges the files.
"""

from __future__ import annotations

import os
from typing import Any

import numpy as np
from prometheus_client import (
    CONTENT_TYPE_LATEST,
    REGISTRY,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    generate_latest,
)
from prometheus_client.multiprocess import MultiProcessCollector, mark_process_dead

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


def forget_dead_processes() -> list[int]:
    """In multiprocess mode, drop the live gauges of processes that are gone (a worker
    killed without its shutdown); run by each API worker as it starts. Their counters
    and histograms stay, so totals never go back."""
    folder = os.environ.get("PROMETHEUS_MULTIPROC_DIR")
    if not folder:
        return []
    dead = []
    for pid in {int(name.rsplit("_", 1)[1][:-3]) for name in os.listdir(folder)
                if name.startswith("gauge_live") and name.endswith(".db")}:
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            mark_process_dead(pid, folder)
            dead.append(pid)
        except PermissionError:  # alive, under another user
            pass
    return dead


def forget_this_process() -> None:
    """At a clean shutdown: this process's live gauges leave the merged view."""
    if os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        mark_process_dead(os.getpid())


def exposition() -> tuple[bytes, str]:
    """The text exposition of this process, or of all processes in multiprocess mode."""
    if os.environ.get("PROMETHEUS_MULTIPROC_DIR"):
        registry = CollectorRegistry()
        MultiProcessCollector(registry)
        return generate_latest(registry), CONTENT_TYPE_LATEST
    return generate_latest(REGISTRY), CONTENT_TYPE_LATEST
