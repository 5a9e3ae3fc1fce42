"""A small, bounded scoring load in threads, recording what each request got."""

from __future__ import annotations

import threading
import time
from collections import Counter
from dataclasses import dataclass, field

import httpx

POINTS = {"points": [[0.1, 0.2], [5.0, 6.5], [2.5, 3.0]] * 4}


@dataclass
class Load:
    """``threads`` clients scoring ``model`` on ``url`` until ``stop()`` (or 120 s)."""

    url: str
    model: str
    threads: int = 4
    limit_s: float = 120.0
    outcomes: list[tuple[float, str]] = field(default_factory=list)
    _stop: threading.Event = field(default_factory=threading.Event)
    _workers: list[threading.Thread] = field(default_factory=list)

    def __enter__(self) -> Load:
        for _ in range(self.threads):
            worker = threading.Thread(target=self._run, daemon=True)
            worker.start()
            self._workers.append(worker)
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        for worker in self._workers:
            worker.join(10)

    def _run(self) -> None:
        deadline = time.monotonic() + self.limit_s
        target = f"{self.url}/v1/models/{self.model}/log-density"
        with httpx.Client(timeout=5) as client:
            while not self._stop.is_set() and time.monotonic() < deadline:
                try:
                    outcome = str(client.post(target, json=POINTS).status_code)
                except httpx.HTTPError as error:
                    outcome = type(error).__name__
                self.outcomes.append((time.monotonic(), outcome))

    def counts(self, since: float = 0.0, until: float = float("inf")) -> Counter[str]:
        return Counter(outcome for at, outcome in list(self.outcomes) if since <= at < until)
