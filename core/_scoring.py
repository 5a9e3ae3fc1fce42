"""Unchecked scoring of dense rows: chunked for batches, row-wise for a few points.

Batches are cut into chunks of ``CHUNK_ROWS`` rows, whose (k d, c) work buffer
stays in cache; the kernels' GEMMs run on the calling thread (see
``_kernels.GEMM_COLUMNS``). Large batches spread their chunks over ``THREADS``
Python threads (numpy releases the GIL in the heavy calls); both choices were
measured in loadtests/bench_core.py.

Rows whose result is not finite (missing entries, overflow) are left for the
caller to repair; ``Mixture`` does that by marginalising.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from ._covariance import Covariance
from ._validation import FloatArray

CHUNK_ROWS = 384
#: Batches up to this size take the row-wise path, which has less fixed overhead.
SMALL_BATCH_ROWS = 16
#: Threads for batches of at least ``PARALLEL_MIN_ROWS`` rows.
THREADS = 2
PARALLEL_MIN_ROWS = 8192
#: A chunk row whose shifted sum of exponentials falls below this is recomputed with a
#: per-row maximum; far below any density a mixture in double precision can resolve.
UNDERFLOW = 1e-250
LOG_2PI = float(np.log(2.0 * np.pi))

#: (start, exp(log_joint - shift) (k, c), its sum over k, the chunk's rows (c, d))
ChunkBody = Callable[[int, FloatArray, FloatArray, FloatArray], None]

_pool: tuple[int, ThreadPoolExecutor] | None = None


def thread_pool() -> ThreadPoolExecutor:
    """One pool per process; a forked child builds its own."""
    global _pool
    if _pool is None or _pool[0] != os.getpid():
        _pool = (os.getpid(), ThreadPoolExecutor(THREADS, thread_name_prefix="mixscore"))
    return _pool[1]


def log_constants(weights: FloatArray, dimension: int, log_det: FloatArray) -> FloatArray:
    """log w_j - (d log 2 pi + log |S_j|) / 2 per component j: its log-joint at its mean."""
    with np.errstate(divide="ignore"):  # a weight of 0 gives -inf: a component never chosen
        log_weights = np.log(weights)
    return log_weights - 0.5 * (dimension * LOG_2PI + log_det)


class CompiledMixture:
    """Precomputed factors of one mixture: everything the hot path needs."""

    def __init__(self, weights: FloatArray, means: FloatArray, covariance: Covariance) -> None:
        self.components, self.dimension = means.shape
        # Centring on the mixture mean keeps the expanded quadratic forms accurate.
        self.center = weights @ means
        constants = log_constants(weights, self.dimension, covariance.log_det())
        # Shifting by the largest constant makes every log-joint <= 0: exp never overflows.
        self.shift = float(constants.max())
        self.kernel = covariance.kernel(means, constants, self.center, self.shift)

    @property
    def nbytes(self) -> int:
        """Memory of its arrays."""
        arrays = [value for value in vars(self.kernel).values() if isinstance(value, np.ndarray)]
        return self.center.nbytes + sum(array.nbytes for array in arrays)

    def _sweep(self, X: FloatArray, starts: range, body: ChunkBody) -> None:
        """Run ``body`` on the chunks beginning at ``starts``, with buffers of its own."""
        k, d = self.components, self.dimension
        joint_buffer = np.empty(k * CHUNK_ROWS)
        work = np.empty(self.kernel.work_size(CHUNK_ROWS))
        augmented_buffer = np.empty((d + 1) * CHUNK_ROWS)
        shape = (0, 0)
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            for start in starts:
                rows = X[start : start + CHUNK_ROWS]
                m = rows.shape[0]
                augmented = augmented_buffer[: (d + 1) * m].reshape(d + 1, m)
                if augmented.shape != shape:  # only the last chunk differs
                    augmented[d] = 1.0
                    shape = augmented.shape
                np.subtract(rows.T, self.center[:, None], out=augmented[:d])
                joint = joint_buffer[: k * m].reshape(k, m)
                self.kernel.chunk(augmented, joint, work)
                np.exp(joint, out=joint)
                body(start, joint, joint.sum(axis=0), rows)

    def _each_chunk(self, X: FloatArray, body: ChunkBody) -> None:
        n = X.shape[0]
        if n < PARALLEL_MIN_ROWS:
            self._sweep(X, range(0, n, CHUNK_ROWS), body)
            return
        step = THREADS * CHUNK_ROWS
        parts = [range(i * CHUNK_ROWS, n, step) for i in range(THREADS)]
        for future in [thread_pool().submit(self._sweep, X, part, body) for part in parts]:
            future.result()

    def log_density_few(self, X: FloatArray) -> FloatArray:
        """Log-densities of a few rows (n <= SMALL_BATCH_ROWS), max-stabilised per row.

        No error-state guard: the caller passes finite rows of moderate size.
        """
        return np.logaddexp.reduce(self.kernel.rows(X), axis=1)

    def log_density(self, X: FloatArray) -> FloatArray:
        """(n,) log-densities; rows with NaN (or overflow) come out non-finite."""
        if X.shape[0] <= SMALL_BATCH_ROWS:
            with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
                return self.log_density_few(X)
        out = np.empty(X.shape[0])

        def body(start: int, _: FloatArray, total: FloatArray, rows: FloatArray) -> None:
            chunk = out[start : start + total.shape[0]]
            np.log(total, out=chunk)
            chunk += self.shift
            if total.min() < UNDERFLOW:
                low = np.flatnonzero(total < UNDERFLOW)
                chunk[low] = self.log_density_few(rows[low])

        self._each_chunk(X, body)
        return out

    def responsibilities(self, X: FloatArray) -> FloatArray:
        """(n, k) posterior probabilities; rows with NaN come out non-finite."""
        if X.shape[0] <= SMALL_BATCH_ROWS:
            with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
                return self._responsibilities_few(X)
        out = np.empty((X.shape[0], self.components))

        def body(start: int, joint: FloatArray, total: FloatArray, rows: FloatArray) -> None:
            stop = start + total.shape[0]
            np.divide(joint, total, out=out[start:stop].T)
            if total.min() < UNDERFLOW:
                low = np.flatnonzero(total < UNDERFLOW)
                out[start + low] = self._responsibilities_few(rows[low])

        self._each_chunk(X, body)
        return out

    def _responsibilities_few(self, X: FloatArray) -> FloatArray:
        joint = self.kernel.rows(X)
        joint -= np.logaddexp.reduce(joint, axis=1)[:, None]
        return np.exp(joint)
