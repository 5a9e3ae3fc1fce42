"""Unchecked scoring of dense rows: chunked for batches, row-wise for a few points.

Rows whose result is not finite (missing entries, overflow) are left for the
caller to repair; ``Mixture`` does that by marginalising.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from ._covariance import Covariance
from ._validation import FloatArray

#: Rows per chunk: the (k d, c) work buffer stays in cache (see loadtests/bench_core.py).
CHUNK_ROWS = 2048
#: Batches up to this size take the row-wise path, which has less fixed overhead.
SMALL_BATCH_ROWS = 16
#: A chunk row whose shifted sum of exponentials falls below this is recomputed with a
#: per-row maximum; far below any density a mixture in double precision can resolve.
UNDERFLOW = 1e-250
LOG_2PI = float(np.log(2.0 * np.pi))


class CompiledMixture:
    """Precomputed factors of one mixture: everything the hot path needs."""

    def __init__(self, weights: FloatArray, means: FloatArray, covariance: Covariance) -> None:
        self.components, self.dimension = means.shape
        # Centring on the mixture mean keeps the expanded quadratic forms accurate.
        self.center = weights @ means
        with np.errstate(divide="ignore"):
            log_weights = np.log(weights)
        constants = log_weights - 0.5 * (self.dimension * LOG_2PI + covariance.log_det())
        # Shifting by the largest constant makes every log-joint <= 0: exp never overflows.
        self.shift = float(constants.max())
        self.kernel = covariance.kernel(means - self.center, constants - self.shift)

    def _chunks(self, X: FloatArray) -> Iterator[tuple[int, FloatArray, FloatArray, FloatArray]]:
        """Yield (start, exp(log_joint - shift) (k, c), its sum over k, centred rows).

        The buffers are reused by the next chunk.
        """
        n = X.shape[0]
        size = min(CHUNK_ROWS, n)
        k, d = self.components, self.dimension
        joint_buffer = np.empty(k * size)
        work = np.empty(self.kernel.work_size(size))
        augmented_buffer = np.ones((size, d + 1))
        for start in range(0, n, size):
            rows = X[start : start + size]
            m = rows.shape[0]
            augmented = augmented_buffer[:m]
            np.subtract(rows, self.center, out=augmented[:, :d])
            joint = joint_buffer[: k * m].reshape(k, m)
            self.kernel.chunk(augmented, joint, work)
            np.exp(joint, out=joint)
            yield start, joint, joint.sum(axis=0), augmented[:, :d]

    def _stable_log_joint(self, centered: FloatArray) -> tuple[FloatArray, FloatArray]:
        """(n, k) shifted log-joint and (n,) log-density of a few rows, max-stabilised."""
        joint = self.kernel.rows(centered)
        return joint, np.logaddexp.reduce(joint, axis=1) + self.shift

    def log_density(self, X: FloatArray) -> FloatArray:
        """(n,) log-densities; rows with NaN (or overflow) come out non-finite."""
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            if X.shape[0] <= SMALL_BATCH_ROWS:
                return self._stable_log_joint(X - self.center)[1]
            out = np.empty(X.shape[0])
            for start, _, total, centered in self._chunks(X):
                chunk = out[start : start + total.shape[0]]
                np.log(total, out=chunk)
                chunk += self.shift
                low = np.flatnonzero(total < UNDERFLOW)
                if low.size:
                    chunk[low] = self._stable_log_joint(centered[low])[1]
        return out

    def responsibilities(self, X: FloatArray) -> FloatArray:
        """(n, k) posterior probabilities; rows with NaN come out non-finite."""
        with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
            if X.shape[0] <= SMALL_BATCH_ROWS:
                return self._stable_responsibilities(X - self.center)
            out = np.empty((X.shape[0], self.components))
            for start, joint, total, centered in self._chunks(X):
                stop = start + total.shape[0]
                np.multiply(joint, 1.0 / total, out=out[start:stop].T)
                low = np.flatnonzero(total < UNDERFLOW)
                if low.size:
                    out[start + low] = self._stable_responsibilities(centered[low])
        return out

    def _stable_responsibilities(self, centered: FloatArray) -> FloatArray:
        joint, log_density = self._stable_log_joint(centered)
        return np.exp(joint - (log_density - self.shift)[:, None])
