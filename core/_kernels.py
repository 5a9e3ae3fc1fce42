"""Unchecked log-joint kernels, one per way of computing Mahalanobis distances.

A kernel computes ``log(w_j) + log N(x | mu_j, S_j)`` for every component j, in
two layouts:

* ``chunk``: a block of c rows arrives centred on ``center`` and transposed, with
  a last row of ones, (d + 1, c); the result is written as (k, c), so every
  operation runs over contiguous rows of length c. The ones row folds the mean
  offsets into the GEMM. Values are shifted down by ``shift`` (the largest
  per-component constant), so they are never above 0 and ``exp`` cannot overflow.
* ``rows``: a few raw rows (n, d) in, the unshifted (n, k) log-joint out, in as
  few numpy calls as possible (the single-point path), computed directly from
  x - mu so no expansion loses digits.
"""

from __future__ import annotations

from abc import ABC, abstractmethod

import numpy as np

from ._validation import FloatArray

HALF_ROOT = float(np.sqrt(0.5))
#: Columns per GEMM call. OpenBLAS 0.3.31 runs a (k d, d + 1) @ (d + 1, c) GEMM for
#: k = 8, d = 16 on its own threads from c = 256: less than 1.2 times faster for twice
#: the CPU, and a worker left spinning for 0.11 s after each call, a whole core on a
#: 2-core machine taken from the next request (measured as CPU time in a sleep after
#: the call; tests/core/test_threads.py checks). At 192 columns it stays on the calling
#: thread, as scoring's own threads expect.
GEMM_COLUMNS = 192


def matmul_here(a: FloatArray, b: FloatArray, out: FloatArray) -> None:
    """``a @ b`` into ``out`` on the calling thread: in pieces of GEMM_COLUMNS columns."""
    for start in range(0, b.shape[1], GEMM_COLUMNS):
        part = slice(start, start + GEMM_COLUMNS)
        np.matmul(a, b[:, part], out=out[:, part])


class Kernel(ABC):
    """Log-joint of rows under every component."""

    @abstractmethod
    def work_size(self, rows: int) -> int:
        """Float64 values of scratch space ``chunk`` needs for that many rows."""

    @abstractmethod
    def chunk(self, augmented: FloatArray, out: FloatArray, work: FloatArray) -> None:
        """Write the shifted (k, c) log-joint of the ``augmented`` (d + 1, c) block."""

    @abstractmethod
    def rows(self, X: FloatArray) -> FloatArray:
        """Return the unshifted (n, k) log-joint of a few raw rows (n, d)."""


class ProjectedKernel(Kernel):
    """Full covariances: one GEMM projects the rows by all k precision factors.

    With y_j = sqrt(1/2) U_j^T (x - mu_j), the log-joint is c_j - |y_j|^2.
    """

    def __init__(self, factors: FloatArray, means: FloatArray, constants: FloatArray,
                 center: FloatArray, shift: float) -> None:
        k, d, _ = factors.shape
        self.k, self.d = k, d
        scaled = HALF_ROOT * factors
        stack = scaled.transpose(0, 2, 1).reshape(k * d, d)  # row j*d + a: column a of U_j
        offsets = np.einsum("ka,kab->kb", means - center, scaled).reshape(k * d, 1)
        self.stack = np.ascontiguousarray(np.hstack([stack, -offsets]))
        self.constants = (constants - shift)[:, None]
        self.row_stack = np.ascontiguousarray(stack.T)
        self.row_offsets = np.einsum("ka,kab->kb", means, scaled).reshape(k * d)
        self.block_sum = np.kron(np.eye(k), np.ones((d, 1)))
        self.row_constants = constants

    def work_size(self, rows: int) -> int:
        return self.k * self.d * rows

    def chunk(self, augmented: FloatArray, out: FloatArray, work: FloatArray) -> None:
        rows = augmented.shape[1]
        projected = work[: self.k * self.d * rows].reshape(self.k * self.d, rows)
        matmul_here(self.stack, augmented, projected)
        blocks = projected.reshape(self.k, self.d, rows)
        # One fused pass: 20-25 % faster than square then sum (bench_core.py).
        np.einsum("kdc,kdc->kc", blocks, blocks, out=out)
        np.subtract(self.constants, out, out=out)

    def rows(self, X: FloatArray) -> FloatArray:
        projected = X @ self.row_stack
        projected -= self.row_offsets
        projected *= projected
        return self.row_constants - projected @ self.block_sum


class ExpandedKernel(Kernel):
    """Diagonal and spherical: -1/2 sum_a p_a (x_a - m_a)^2 expanded into one GEMM
    over the features (x^2, x, 1) of the centred rows."""

    def __init__(self, precisions: FloatArray, means: FloatArray, constants: FloatArray,
                 center: FloatArray, shift: float) -> None:
        self.d = means.shape[1]
        centered = means - center
        quadratic = -0.5 * precisions
        linear = precisions * centered
        offset = constants - shift - 0.5 * (precisions * centered**2).sum(axis=1)
        self.coefficients = np.ascontiguousarray(np.hstack([quadratic, linear, offset[:, None]]))
        self.means = means
        self.half_precisions = 0.5 * precisions
        self.row_constants = constants

    def work_size(self, rows: int) -> int:
        return (2 * self.d + 1) * rows

    def chunk(self, augmented: FloatArray, out: FloatArray, work: FloatArray) -> None:
        rows = augmented.shape[1]
        d = self.d
        features = work[: (2 * d + 1) * rows].reshape(2 * d + 1, rows)
        np.square(augmented[:d], out=features[:d])
        features[d:] = augmented
        np.matmul(self.coefficients, features, out=out)

    def rows(self, X: FloatArray) -> FloatArray:
        deviations = X[:, None, :] - self.means
        deviations *= deviations
        deviations *= self.half_precisions
        return self.row_constants - deviations.sum(axis=2)


class SharedKernel(Kernel):
    """Shared: whiten once by the shared factor, y = U^T x, then
    c_j + b_j.y - |y|^2 / 2 - |b_j|^2 / 2 with b_j = U^T mu_j."""

    def __init__(self, factor: FloatArray, means: FloatArray, constants: FloatArray,
                 center: FloatArray, shift: float) -> None:
        self.d = factor.shape[0]
        centers = (means - center) @ factor
        offset = constants - shift - 0.5 * (centers**2).sum(axis=1)
        self.factor_t = np.ascontiguousarray(factor.T)
        self.centers_aug = np.ascontiguousarray(np.hstack([centers, offset[:, None]]))
        self.factor = np.ascontiguousarray(HALF_ROOT * factor)
        self.row_centers = HALF_ROOT * means @ factor
        self.row_constants = constants

    def work_size(self, rows: int) -> int:
        return (self.d + 2) * rows

    def chunk(self, augmented: FloatArray, out: FloatArray, work: FloatArray) -> None:
        rows = augmented.shape[1]
        d = self.d
        whitened = work[: (d + 1) * rows].reshape(d + 1, rows)
        np.matmul(self.factor_t, augmented[:d], out=whitened[:d])
        whitened[d] = 1.0
        np.matmul(self.centers_aug, whitened, out=out)
        squares = whitened[:d]
        np.square(squares, out=squares)
        half_norms = work[(d + 1) * rows : (d + 2) * rows]
        np.sum(squares, axis=0, out=half_norms)
        half_norms *= 0.5
        out -= half_norms

    def rows(self, X: FloatArray) -> FloatArray:
        deviations = (X @ self.factor)[:, None, :] - self.row_centers
        deviations *= deviations
        return self.row_constants - deviations.sum(axis=2)
