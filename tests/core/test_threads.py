"""Scoring and explanations keep their GEMMs on the calling thread (core/_kernels.py,
GEMM_COLUMNS), their own two threads being the parallelism: a GEMM on OpenBLAS's
threads leaves a worker spinning for about 0.1 s after it returns, a core of a 2-core
machine taken from the next request. Measured as the CPU time the process spends
while the test sleeps right after the call."""

from __future__ import annotations

import resource
import time

import numpy as np
import pytest

from .helpers import random_mixture


def cpu_while_asleep(seconds: float) -> float:
    def cpu() -> float:
        usage = resource.getrusage(resource.RUSAGE_SELF)
        return usage.ru_utime + usage.ru_stime

    start = cpu()
    time.sleep(seconds)
    return cpu() - start


@pytest.mark.parametrize("call", ["log_density", "responsibilities", "explain"])
def test_no_blas_worker_is_left_spinning(call: str) -> None:
    rng = np.random.default_rng(5)
    mixture = random_mixture(rng, "full", 8, 16)  # the benchmark's shape: k d = 128
    X, _ = mixture.sample(4_000, seed=6)  # one scoring thread
    cpu_while_asleep(0.3)  # workers of earlier BLAS calls (the sampling's) park
    getattr(mixture, call)(X)
    assert cpu_while_asleep(0.25) < 0.03


def test_no_blas_worker_is_left_spinning_by_a_model_load_or_a_marginal() -> None:
    """Both factor covariances: once per version an API worker loads, and once per
    missingness pattern of a request."""
    rng = np.random.default_rng(7)
    mixture = random_mixture(rng, "full", 8, 16)
    cpu_while_asleep(0.3)
    mixture.compiled()
    assert cpu_while_asleep(0.25) < 0.03
    mixture.marginal([0, 2, 5]).compiled()
    assert cpu_while_asleep(0.25) < 0.03
