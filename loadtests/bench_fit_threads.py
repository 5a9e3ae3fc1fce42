"""How many threads a fit should use: BLAS threads x the E-step's own lanes, measured.

Two fits, each in every combination of BLAS threads (1, or the machine's default)
and E-step lanes (1 or 2): the wind-farm demo's selection (1-8 components, four
structures, two restarts, as `mixscore demo` submits it) and 20 EM iterations of a
full 8-component fit to 200 000 x 16 rows. Prints seconds (best of ``--rounds``) and
each configuration's time over the fastest. Fit workers use the fastest
(``MIXSCORE_FIT_BLAS_THREADS``, README, Performance).

Run:  python loadtests/bench_fit_threads.py [--rounds 2]
"""

from __future__ import annotations

import argparse
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_info, threadpool_limits

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import core._estep as estep
from core import fit, select
from service.demo import FIT_OPTIONS, TRAINING_DAYS
from service.demo_data import operating_records


def demo_selection() -> None:
    """The core call a demo fit job makes (as service.worker.fit_job does)."""
    low, high = FIT_OPTIONS["components"]
    select(operating_records(TRAINING_DAYS).points, components=range(low, high + 1),
           structures=FIT_OPTIONS["structure"], restarts=FIT_OPTIONS["restarts"],
           seed=FIT_OPTIONS["seed"])


def large_fit(X: np.ndarray) -> Callable[[], object]:
    return lambda: fit(X, components=8, restarts=1, max_iterations=20, tolerance=0.0, seed=1)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=2)
    args = parser.parse_args()
    default = max(info["num_threads"] for info in threadpool_info()
                  if info["user_api"] == "blas")
    X = np.random.default_rng(0).standard_normal((200_000, 16)) * np.arange(1, 17)
    fits = {"demo selection (32 candidates)": demo_selection,
            "200 000 x 16, k = 8, 20 iterations": large_fit(X)}
    configurations = [(blas, lanes) for blas in (1, default) for lanes in (1, 2)]
    for name, call in fits.items():
        times = {}
        for blas, lanes in configurations:
            estep.LANES = lanes
            best = np.inf
            for _ in range(args.rounds):
                with threadpool_limits(blas, user_api="blas"):
                    start = time.perf_counter()
                    call()
                    best = min(best, time.perf_counter() - start)
            times[(blas, lanes)] = best
        fastest = min(times.values())
        print(name)
        for (blas, lanes), seconds in times.items():
            print(f"  BLAS threads {blas}, lanes {lanes}: {seconds:6.2f} s  "
                  f"({seconds / fastest:.2f} x the fastest)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
