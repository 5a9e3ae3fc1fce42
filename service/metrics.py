"""Every Prometheus metric, defined once. Labels are bounded: route templates, methods,
statuses, model names and fixed event names, never values from request bodies.

With several worker processes, PROMETHEUS_MULTIPROC_DIR must be set before Python
starts (``mixscore serve --workers N`` does it); each scrape then merges the files.
"""

from __future__ import annotations

import contextlib
import os
import threading
from collections.abc import Callable
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

#: Tail fractions are uniform on [0, 1] for rows like the training rows: these buckets
#: show the low tail in detail and the rest coarsely.
TAIL_FRACTION_BUCKETS = (0.001, 0.01, 0.05, 0.1, 0.25, 0.5, 0.75, 1.0)
TAIL_FRACTION = Histogram(
    "mixscore_tail_fraction", "Tail fractions of scored complete rows; uniform on [0, 1] while "
    "live data follow the training distribution (1 % of them below 0.01).",
    ["model", "version"], buckets=TAIL_FRACTION_BUCKETS)
DRIFT_KS = Gauge(
    "mixscore_drift_ks_statistic", "Kolmogorov-Smirnov distance between the tail fractions of "
    "the last MIXSCORE_DRIFT_WINDOW complete rows that any API process scored and the uniform "
    "law, computed at the scrape; set once the window is full. Above 1.95 / sqrt(window): "
    "drift, at a 0.001 false-alarm rate.", ["model", "version"],
    multiprocess_mode="livemostrecent")

# Exported by the API and fit workers alike.
REPLICA_WAIT = Histogram(
    "mixscore_replica_wait_seconds", "Time from sending a write to its confirmation by "
    "MIXSCORE_REDIS_MIN_REPLICAS replicas, or to the timeout, by outcome (confirmed, "
    "unconfirmed); the replication lag that writes see.", ["outcome"],
    buckets=LATENCY_BUCKETS_S)
for _outcome in ("confirmed", "unconfirmed"):  # exported at 0 before the first write
    REPLICA_WAIT.labels(_outcome)

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


def unlabel(metric: Any, *labels: str) -> None:
    """Remove the metric's child for these label values (and ``labelled``'s handle)."""
    _children.pop((id(metric), labels), None)
    with contextlib.suppress(KeyError):
        metric.remove(*labels)


#: Up to this many values, ``observe`` one by one costs less than the array calls.
FEW_OBSERVED = 8


def observe_many(histogram: Any, values: np.ndarray) -> None:
    """``histogram.observe(v)`` for every v, as one increment per bucket: a call per
    row would cost more than scoring it. prometheus_client keeps per-bucket (not
    cumulative) counts in ``_buckets`` and the total in ``_sum``; tests/service/
    test_metrics.py checks this against ``observe``."""
    if values.size <= FEW_OBSERVED:
        for value in values.tolist():
            histogram.observe(value)
        return
    bounds = np.asarray(histogram._upper_bounds)
    counts = np.bincount(np.searchsorted(bounds, values, side="left"), minlength=bounds.size)
    for bucket, count in zip(histogram._buckets, counts.tolist(), strict=True):
        if count:
            bucket.inc(count)
    histogram._sum.inc(float(values.sum()))


def ks_uniform(values: np.ndarray) -> float:
    """sup |F_n(x) - x|: the Kolmogorov-Smirnov distance of a sample to the uniform law."""
    x = np.sort(values)
    n = x.size
    above = np.arange(1, n + 1) / n - x
    below = x - np.arange(n) / n
    return float(max(above.max(), below.max()))


class DriftTracker:
    """Per (model, version): the exponentially weighted mean log-density of scored rows,
    the histogram of their tail fractions, and the tail fractions not yet appended to
    the version's drift window shared through Redis (``service/drift.py``)."""

    def __init__(self, window: int = 1000) -> None:
        self.window = window
        #: Called (from any thread) when tail fractions are noted: wakes the appender.
        self.noted: Callable[[], None] = lambda: None
        self._means: dict[tuple[str, int], float] = {}
        self._pending: dict[tuple[str, int], list[np.ndarray]] = {}
        self._lock = threading.Lock()  # requests score on several threads

    def forget(self, model: str, version: int) -> None:
        """Drop a version's state and its mean's gauge (no longer cached: not served
        here). Its drift window lives on in Redis while other processes score it."""
        with self._lock:
            self._means.pop((model, version), None)
        unlabel(LOG_DENSITY_DRIFT, model, str(version))

    def observe(self, model: str, version: int, log_densities: Any,
                training_mean: float, tail_fractions: np.ndarray) -> None:
        """Rows scored complete: their log-densities and tail fractions."""
        with self._lock:
            self._observe(model, version, log_densities, training_mean, tail_fractions)
        if tail_fractions.size:
            self.noted()

    def take_pending(self) -> dict[tuple[str, int], np.ndarray]:
        """The tail fractions noted since the last call, per (model, version), the last
        ``window`` of each at most."""
        with self._lock:
            pending, self._pending = self._pending, {}
        return {key: np.concatenate(parts)[-self.window:] for key, parts in pending.items()}

    def _observe(self, model: str, version: int, log_densities: Any,
                 training_mean: float, tail_fractions: np.ndarray) -> None:
        key = (model, version)
        labels = (model, str(version))
        # Rows below the float range have a tail fraction (0) but no log-density to average.
        observe_many(labelled(TAIL_FRACTION, *labels), tail_fractions)
        if tail_fractions.size:  # at most ``window`` kept, however long Redis is away
            parts = self._pending.setdefault(key, [])
            parts.append(np.array(tail_fractions[-self.window:], dtype="<f8"))
            if sum(part.size for part in parts) > 2 * self.window:
                parts[:] = [np.concatenate(parts)[-self.window:]]
        finite = log_densities[np.isfinite(log_densities)]
        if finite.size == 0:
            return
        batch_mean = float(finite.mean())
        previous = self._means.get(key)
        if previous is None:
            mean = batch_mean
        else:  # n rows at once move the mean as n single updates would, to first order
            share = 1.0 - (1.0 - DRIFT_ROW_WEIGHT) ** finite.size
            mean = previous + share * (batch_mean - previous)
        self._means[key] = mean
        labelled(LOG_DENSITY_DRIFT, *labels).set(mean - training_mean)


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
