"""Where a request's maths runs: on the event loop when it is cheap, else on a thread.

Whatever runs on the loop delays every other request of the process, /healthz
included, so the choice is made by the work a request asks for, estimated before
it runs: rows times components times features (times features again where a
covariance is a full matrix), missing patterns (each compiles a marginal), samples
times features, and the numbers of the answer to encode. Row count alone misjudged
it: 2 000 rows of distinct missing patterns took 0.64 s on the loop.

The coefficients are seconds per unit of work measured on these 2-core machines
(numpy with OpenBLAS on the calling thread; loadtests/bench_loop.py prints the
loop's latency under heavy requests). Heavy requests share ``HEAVY_THREADS``
threads: more would only compete for the same cores and the GIL with the loop.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

import numpy as np

from core import Mixture

#: The most estimated seconds of maths a request may spend on the event loop.
INLINE_S = 0.001
#: Threads heavy requests run on: one per core.
HEAVY_THREADS = 2
#: Seconds per row, and per row x component x feature x (feature for full matrices).
ROW_S = {"log-density": 1e-7, "responsibilities": 1e-7, "conditional": 1e-7,
         "explanations": 3e-6, "samples": 1e-7}
UNIT_S = {"log-density": 5e-10, "responsibilities": 5e-10, "conditional": 5e-10,
          "explanations": 4e-9, "samples": 1e-9}
#: Seconds to compile one missing pattern's marginal mixture, per component x feature^3,
#: and its fixed part (Python objects, a factorisation per component).
PATTERN_S, PATTERN_UNIT_S = 1e-4, 1e-9
#: Seconds to turn one number of the answer into JSON (MessagePack arrays are copied),
#: and to read one byte of a request body into an array.
ENCODE_S = 6e-8
DECODE_S = 1e-8

T = TypeVar("T")
_pool: ThreadPoolExecutor | None = None


def estimated_s(endpoint: str, mixture: Mixture, rows: int, patterns: int = 0,
                answer_values: int = 0) -> float:
    """Seconds of work of ``rows`` rows (or samples) with ``patterns`` missing patterns."""
    k, d = mixture.components, mixture.dimension
    matrix = d if mixture.structure in ("full", "shared") else 1
    return (rows * (ROW_S[endpoint] + k * d * matrix * UNIT_S[endpoint])
            + patterns * (PATTERN_S + k * d**3 * PATTERN_UNIT_S)
            + answer_values * ENCODE_S)


def incomplete_rows(X: np.ndarray) -> int:
    """Rows with a missing value: at most as many missing patterns (each costs a compiled
    marginal, or a batched factor per row, counted here as the former)."""
    return int(np.isnan(X).any(axis=1).sum())


async def run(seconds: float, work: Callable[[], T]) -> T:
    """``work()`` on the loop when ``seconds`` is within INLINE_S, else on a heavy thread."""
    if seconds <= INLINE_S:
        return work()
    return await asyncio.get_running_loop().run_in_executor(heavy_pool(), _guarded, work)


def _guarded(work: Callable[[], T]) -> T:
    """A future cannot carry StopIteration (its await would never end): make it an error."""
    try:
        return work()
    except StopIteration as error:
        raise RuntimeError("StopIteration escaped a computation") from error


def heavy_pool() -> ThreadPoolExecutor:
    global _pool
    if _pool is None:
        _pool = ThreadPoolExecutor(HEAVY_THREADS, thread_name_prefix="mixscore-heavy")
    return _pool
