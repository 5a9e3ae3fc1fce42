"""Connections closed under calls in flight, as a failover closes them, between a real
`mixscore serve` (uvicorn on uvloop) and a real redis-server (tests/relay.py cuts them).

Whatever exception the installed redis-py and event loop raise for it, the answer is
a 503 problem (Retry-After) or, for scoring, the cached version: never a 500. A write
whose answer was lost is repeated with its Idempotency-Key and writes nothing twice."""

from __future__ import annotations

import threading
import time
from collections import Counter
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import httpx
import pytest

from service.embedded import EmbeddedRedis
from service.redis_clients import outage

from ..relay import MODES, Relay, relay
from ..service.servers import api_process

MODEL = {"structure": "diagonal", "weights": [0.5, 0.5], "means": [[0, 0], [5, 6]],
         "covariances": [[1, 1], [2, 2]]}
POINTS = {"points": [[0.1, 0.2], [5.0, 6.1], [2.5, None]]}
FIT = {"points": [[0.0, 0.1], [0.2, -0.1], [5.0, 6.2], [5.3, 5.9]] * 5, "components": 2,
       "structure": "spherical", "seed": 1}


def calls(url: str, tag: str) -> dict[str, Callable[[], httpx.Response]]:
    """One call of each kind that needs Redis, with its Idempotency-Key where it writes."""
    base = f"{url}/v1/models/turbine"
    return {
        "import": lambda: httpx.post(f"{base}/versions", json={**MODEL, "serve": False},
                                     headers={"Idempotency-Key": f"import-{tag}"}),
        "fit": lambda: httpx.post(f"{base}/fits", json=FIT,
                                  headers={"Idempotency-Key": f"fit-{tag}"}),
        "model": lambda: httpx.get(base),
        "jobs": lambda: httpx.get(f"{url}/v1/jobs"),
        "ready": lambda: httpx.get(f"{url}/readyz"),
        "score": lambda: httpx.post(f"{base}/log-density", json=POINTS),
    }


#: What each kind may answer while connections are cut: scoring keeps its cached model;
#: fit submissions meet the limit of queued jobs (no worker runs them here).
ALLOWED = {"import": {201, 503}, "fit": {202, 429, 503}, "model": {200, 503},
           "jobs": {200, 503}, "ready": {200, 503}, "score": {200}}


def all_at_once(url: str, tag: str) -> dict[str, httpx.Response]:
    kinds = calls(url, tag)
    with ThreadPoolExecutor(len(kinds)) as pool:
        futures = {kind: pool.submit(call) for kind, call in kinds.items()}
    return {kind: future.result() for kind, future in futures.items()}


def check(answers: dict[str, httpx.Response]) -> None:
    for kind, answer in answers.items():
        assert answer.status_code in ALLOWED[kind], (kind, answer.status_code, answer.text)
        if answer.status_code == 503 and kind != "ready":  # readiness answers its own body
            assert answer.headers["content-type"] == "application/problem+json", answer.text
            assert "retry-after" in answer.headers


@pytest.fixture
def served(redis_server: EmbeddedRedis, key_prefix: str) -> Any:
    with relay(redis_server.port) as cutter, \
            api_process(cutter.url, key_prefix, MIXSCORE_REDIS_TIMEOUT_S="0.5") as url:
        created = httpx.post(f"{url}/v1/models/turbine/versions", json=MODEL)
        assert created.status_code == 201, created.text
        assert httpx.post(f"{url}/v1/models/turbine/log-density", json=POINTS
                          ).status_code == 200  # compiled and cached
        yield cutter, url


@pytest.mark.parametrize("mode", [mode for mode in MODES if mode != "pass"])
def test_every_call_cut_in_flight_answers_503_or_the_cache(served: tuple[Relay, str],
                                                           mode: str) -> None:
    cutter, url = served
    cutter.mode = mode
    answers = all_at_once(url, mode)
    cuts = cutter.cuts
    cutter.mode = "pass"
    check(answers)
    assert cuts > 0
    assert {answers[kind].status_code for kind in ("import", "fit", "model", "jobs", "ready")
            } == {503}, {kind: answer.text for kind, answer in answers.items()}

    again = all_at_once(url, mode)  # the same Idempotency-Keys, connections intact
    assert {kind: answer.status_code for kind, answer in again.items()} == {
        "import": 201, "fit": 202, "model": 200, "jobs": 200, "ready": 200, "score": 200}
    # A write the server ran before its answer was cut is the one the repeat returns.
    versions = httpx.get(f"{url}/v1/models/turbine").json()["versions"]
    assert [v["version"] for v in versions] == [1, 2], versions
    assert again["import"].json()["version"] == 2


def test_connections_cut_at_random_moments_never_answer_500(served: tuple[Relay, str]) -> None:
    """Four clients call in a loop while the relay switches mode every 20-60 ms for 3 s."""
    cutter, url = served
    seen: Counter[tuple[str, int]] = Counter()
    stop = threading.Event()

    def client(number: int) -> None:
        round_ = 0
        while not stop.is_set():
            for kind, call in calls(url, f"{number}-{round_}").items():
                seen[kind, call().status_code] += 1
            round_ += 1

    def flap() -> None:
        schedule = [MODES[i % len(MODES)] for i in range(1, 1000)]
        deadline = time.monotonic() + 3
        for mode in schedule:
            if time.monotonic() > deadline:
                break
            cutter.mode = mode
            time.sleep(0.02 + 0.01 * (len(mode) % 5))
        cutter.mode = "pass"
        stop.set()

    threads = [threading.Thread(target=client, args=(n,)) for n in range(4)]
    for thread in [*threads, threading.Thread(target=flap)]:
        thread.start()
    for thread in threads:
        thread.join(60)
    wrong = {key: count for key, count in seen.items() if key[1] not in ALLOWED[key[0]]}
    assert not wrong, (wrong, seen)
    assert cutter.cuts > 10 and sum(n for (_, status), n in seen.items() if status == 503), seen
    assert httpx.get(f"{url}/readyz").status_code == 200


def test_the_same_error_types_from_our_own_code_are_bugs() -> None:
    """The client's own state errors under a cut are outages (the tests above); the same
    types raised by the service's code are bugs, answered 500 and logged."""
    try:
        getattr(None, "writelines")([b"PING\r\n"])  # noqa: B009 -- an AttributeError of ours
    except AttributeError as ours:
        assert not outage(ours)
    assert not outage(RuntimeError("something else"))
