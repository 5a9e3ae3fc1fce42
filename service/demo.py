"""``mixscore demo``: the wind-farm scenario against a running service, through the client.

Uploads a healthy week of invented turbine records, fits with selection over 1-8
components and all four structures (a progress bar while the job runs), promotes the
version, scores a new day with faults and sensor dropouts, and prints the most unusual
records with their tail fraction and the regime that explains them best.
"""

from __future__ import annotations

import sys
import time
from typing import Any, TextIO

import httpx
import numpy as np

from . import schemas
from .client import Client, NotFoundError
from .demo_data import FEATURES, Records, monitoring_day, operating_records, regime_of

MODEL = "wind-farm"
TRAINING_DAYS = 7
STRUCTURES = ("full", "diagonal", "spherical", "shared")
#: The demo's fit: 1-8 components and every structure, chosen by BIC.
FIT_OPTIONS: dict[str, Any] = {"components": (1, 8), "structure": STRUCTURES, "restarts": 2,
                               "seed": 7}
READY_WAIT_S = 60.0
#: Job polls per second with a progress bar, and without one (fewer access-log lines).
POLL_S, QUIET_POLL_S = 0.2, 2.0
SHOWN = 12
LABELS = ("wind m/s", "power kW", "rotor rpm", "oil °C", "ambient °C", "vibr. mm/s")


def wait_until_ready(url: str, out: TextIO, quiet: bool) -> None:
    deadline = time.monotonic() + READY_WAIT_S
    first = True
    while True:
        try:
            if httpx.get(f"{url}/readyz", timeout=2).status_code == 200:
                return
        except httpx.HTTPError:
            pass
        if first and not quiet:
            out.write(f"waiting for {url} to be ready (is `make up` running?)\n")
            out.flush()
            first = False
        if time.monotonic() > deadline:
            raise SystemExit(f"mixscore demo: {url} was not ready within {READY_WAIT_S:.0f} s")
        time.sleep(0.2)


class ProgressBar:
    """One line redrawn in place on a terminal; a line per candidate otherwise."""

    WIDTH = 30

    def __init__(self, out: TextIO) -> None:
        self.out = out
        self.tty = out.isatty()
        self.last_candidate = 0
        self.start = time.monotonic()

    def __call__(self, job: schemas.Job) -> None:
        elapsed = time.monotonic() - self.start
        if job.progress is None:
            line = f"fit job {job.id}: {job.state} ({elapsed:.0f} s)"
        else:
            p = job.progress
            done = 1.0 if job.state == "succeeded" else (p.candidate - 1) / p.candidates
            filled = int(done * self.WIDTH)
            line = (f"[{'#' * filled}{'.' * (self.WIDTH - filled)}] candidate "
                    f"{p.candidate}/{p.candidates}, restart {p.restart}, iteration "
                    f"{p.iteration}, log-likelihood {p.log_likelihood:,.0f} ({elapsed:.0f} s)")
            if not self.tty and p.candidate == self.last_candidate:
                return
            self.last_candidate = p.candidate
        if self.tty:
            self.out.write(f"\r\033[K{line}")
            if job.state in ("succeeded", "failed", "cancelled"):
                self.out.write("\n")
        else:
            self.out.write(line + "\n")
        self.out.flush()


def serving_version(mixscore: Client) -> int | None:
    try:
        return mixscore.model(MODEL).serving_version
    except NotFoundError:
        return None


def fit_and_promote(mixscore: Client, out: TextIO) -> int:
    """Upload a healthy week, fit with selection (a progress bar), promote the result."""
    training = operating_records(TRAINING_DAYS)
    dataset = mixscore.upload(training.points, feature_names=FEATURES)
    out.write(f"uploaded {dataset.rows:,} healthy records ({TRAINING_DAYS} days x 12 turbines, "
              f"{len(FEATURES)} sensors) as dataset {dataset.id}\n")
    out.write(f"fitting {MODEL}: 1-8 components x {len(STRUCTURES)} structures, best by BIC\n")
    job = mixscore.fit(MODEL, dataset=dataset.id, feature_names=list(FEATURES),
                       progress=ProgressBar(out), poll_s=POLL_S, **FIT_OPTIONS)
    assert job.version is not None
    previous = mixscore.promote(MODEL, job.version).previous_version
    chosen = mixscore.version(MODEL, job.version).parameters
    kept = f"; version {previous} stays for a rollback" if previous else ""
    out.write(f"{MODEL}: version {job.version} promoted ({chosen.structure}, "
              f"{len(chosen.weights)} components){kept}\n")
    return job.version


def fit_quietly(mixscore: Client, out: TextIO) -> int:
    """For `mixscore up`: fit and serve the model unless a version serves, saying so in one
    line when the fit starts and one when it serves."""
    serving = serving_version(mixscore)
    if serving is not None:
        out.write(f"demo model {MODEL!r}: serving version {serving}\n")
        return serving
    started = time.monotonic()
    dataset = mixscore.upload(operating_records(TRAINING_DAYS).points, feature_names=FEATURES)
    job = mixscore.submit_fit(MODEL, dataset=dataset.id, feature_names=list(FEATURES),
                              serve=True, **FIT_OPTIONS)
    out.write(f"demo model {MODEL!r}: fitting in the background (job {job.id}, about 20 s)\n")
    out.flush()
    done = mixscore.wait(job.id, poll_s=QUIET_POLL_S)
    assert done.version is not None
    out.write(f"demo model {MODEL!r}: serving version {done.version} (fitted in "
              f"{time.monotonic() - started:.0f} s)\n")
    return done.version


def component_regimes(mixscore: Client, version: int) -> list[str]:
    """A name for each component: the regime its mean wind speed falls in."""
    means = np.asarray(mixscore.version(MODEL, version).parameters.means)
    names = regime_of(means[:, 0])
    return [f"{i}: {name}" for i, name in enumerate(names)]


def clock(minute: int) -> str:
    return f"{minute // 60 % 24:02d}:{minute % 60:02d}"


def rarity(tail: float) -> str:
    """The tail fraction to the resolution of the 1001 stored quantiles."""
    return "< 0.001" if tail < 0.001 else f"{tail:.3f}"


def unusual_table(day: Records, order: np.ndarray, log_density: np.ndarray,
                  tail: np.ndarray, regimes: list[str], labels: np.ndarray,
                  unusual: np.ndarray) -> list[str]:
    """``unusual``: per row of ``order``, the sensor least in line with the others."""
    head = (f"{'time':>5} {'turb.':>5} " + " ".join(f"{label:>10}" for label in LABELS)
            + f" {'log-dens.':>9} {'tail frac.':>10}  {'best regime':15} {'odd sensor':10} "
              "injected")
    rows = [head, "-" * len(head)]
    for i, odd in zip(order, unusual, strict=True):
        values = " ".join(f"{v:10.1f}" for v in day.points[i])
        rows.append(f"{clock(int(day.minute[i])):>5} {int(day.turbine[i]):>5} {values} "
                    f"{log_density[i]:9.1f} {rarity(tail[i]):>10}  {regimes[int(labels[i])]:15} "
                    f"{LABELS[int(odd)]:10} {day.fault[i] or '-'}")
    return rows


def score_day(mixscore: Client, version: int, out: TextIO) -> None:
    day = monitoring_day()
    complete = ~np.isnan(day.points).any(axis=1)
    scores = mixscore.log_density(MODEL, day.points)
    labels = mixscore.responsibilities(MODEL, day.points).labels
    assert scores.tail_fraction is not None
    tail = scores.tail_fraction
    regimes = component_regimes(mixscore, version)
    # Rarest first; below every training point the tail fraction is 0, so ties go by
    # log-density.
    order = np.lexsort((scores.log_density, np.where(complete, tail, np.inf)))[:SHOWN]
    out.write(f"\nscored a new day: {len(day.points):,} records, "
              f"{int((~complete).sum())} with a sensor missing\n")
    out.write(f"the {SHOWN} most unusual complete records (lowest tail fraction first):\n")
    unusual = mixscore.explain(MODEL, day.points[order]).most_unusual
    out.write("\n".join(unusual_table(day, order, scores.log_density, tail, regimes, labels,
                                      unusual)) + "\n")
    faulty = day.fault != ""
    caught = int((faulty & complete & (tail < 0.001)).sum())
    false_alarms = int((~faulty & complete & (tail < 0.001)).sum())
    out.write(f"\ntail fraction below 0.001: {caught} of {int((faulty & complete).sum())} "
              f"records with an injected fault, and {false_alarms} of "
              f"{int((~faulty & complete).sum()):,} healthy ones\n")
    show_missing(mixscore, day, ~complete, scores.log_density, tail, out)


def show_missing(mixscore: Client, day: Records, gappy: np.ndarray, log_density: np.ndarray,
                 tail: np.ndarray, out: TextIO) -> None:
    rows = np.flatnonzero(gappy)[:3]
    if not len(rows):
        return
    filled = mixscore.conditional(MODEL, day.points[rows])
    out.write("\nrecords with a sensor missing are scored on the sensors they have (their tail "
              "fraction\nagainst the training records on the same sensors), and the gap is "
              "filled with its\nconditional mean given the others:\n")
    for row, values in zip(rows, filled, strict=True):
        missing = int(np.flatnonzero(np.isnan(day.points[row]))[0])
        out.write(f"  {clock(int(day.minute[row]))} turbine {int(day.turbine[row]):>2}: "
                  f"{FEATURES[missing]} missing -> filled {values[missing]:.1f}; "
                  f"log-density on the other {len(FEATURES) - 1} sensors "
                  f"{log_density[row]:.1f}, tail fraction {rarity(tail[row])}\n")


def run_demo(url: str, api_key: str | None, fit_only: bool, out: TextIO = sys.stdout) -> int:
    """The whole scenario; with ``fit_only``, only make sure the model serves (for `up`)."""
    wait_until_ready(url, out, quiet=fit_only)
    with Client(url, api_key) as mixscore:
        if fit_only:
            fit_quietly(mixscore, out)
            return 0
        version = fit_and_promote(mixscore, out)
        score_day(mixscore, version, out)
        out.write("\nThese scores inform maintenance; they are not a protection system. "
                  "Site procedures and local regulations prevail.\n")
    return 0
