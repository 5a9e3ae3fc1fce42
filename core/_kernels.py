"""Unchecked log-joint kernels, one per way of computing Mahalanobis distances.

Each kernel writes ``log(w_j) + log N(x | mu_j, S_j) - shift`` for every
component j. Because the shift is the largest per-component constant, the
values are never above 0, so ``exp`` cannot overflow.

Two layouts:

* ``chunk``: rows arrive centred with a trailing column of ones, (c, d + 1), and
  the result is written transposed, (k, c), so every later reduction runs over
  contiguous memory. The ones column folds the mean offsets into the GEMM.
* ``rows``: a handful of rows, (n, d) centred, returning (n, k) with as few numpy
  calls as possible; this is the single-point path.
"""

from __future__ import annotations

from abc import ABC, abstractmethod

import numpy as np

from ._validation import FloatArray

HALF_ROOT = float(np.sqrt(0.5))


class Kernel(ABC):
    """Log-joint of centred rows under every component, shifted to be <= 0."""

    @abstractmethod
    def work_size(self, rows: int) -> int:
        """Float64 values of scratch space ``chunk`` needs for that many rows."""

    @abstractmethod
    def chunk(self, augmented: FloatArray, out: FloatArray, work: FloatArray) -> None:
        """Write the (k, c) log-joint of ``augmented`` (c, d + 1) rows into ``out``."""

    @abstractmethod
    def rows(self, centered: FloatArray) -> FloatArray:
        """Return the (n, k) log-joint of a few centred rows (n, d)."""


class ProjectedKernel(Kernel):
    """Full covariances: one GEMM projects the rows by all k precision factors.

    With y_j = sqrt(1/2) U_j^T (x - mu_j), the log-joint is c_j - |y_j|^2.
    """

    def __init__(self, factors: FloatArray, centered_means: FloatArray,
                 constants: FloatArray) -> None:
        k, d, _ = factors.shape
        self.k, self.d = k, d
        scaled = HALF_ROOT * factors
        offsets = np.einsum("ka,kab->kb", centered_means, scaled).reshape(k * d)
        # Row j*d + a holds column a of U_j and, last, minus its offset.
        stack = scaled.transpose(0, 2, 1).reshape(k * d, d)
        self.stack = np.ascontiguousarray(np.hstack([stack, -offsets[:, None]]))
        self.row_stack = np.ascontiguousarray(stack.T)
        self.row_offsets = offsets
        self.block_sum = np.kron(np.eye(k), np.ones((d, 1)))
        self.constants = constants[:, None]
        self.row_constants = constants

    def work_size(self, rows: int) -> int:
        return self.k * self.d * rows

    def chunk(self, augmented: FloatArray, out: FloatArray, work: FloatArray) -> None:
        rows = augmented.shape[0]
        projected = work[: self.k * self.d * rows].reshape(self.k * self.d, rows)
        np.matmul(self.stack, augmented.T, out=projected)
        np.square(projected, out=projected)
        np.sum(projected.reshape(self.k, self.d, rows), axis=1, out=out)
        np.subtract(self.constants, out, out=out)

    def rows(self, centered: FloatArray) -> FloatArray:
        projected = centered @ self.row_stack
        projected -= self.row_offsets
        projected *= projected
        return self.row_constants - projected @ self.block_sum


class ExpandedKernel(Kernel):
    """Diagonal and spherical: -1/2 sum_a p_a (x_a - m_a)^2 expanded into one GEMM
    over the features (x^2, x, 1)."""

    def __init__(self, precisions: FloatArray, centered_means: FloatArray,
                 constants: FloatArray) -> None:
        self.d = centered_means.shape[1]
        quadratic = -0.5 * precisions
        linear = precisions * centered_means
        offset = constants - 0.5 * (precisions * centered_means**2).sum(axis=1)
        self.coefficients = np.ascontiguousarray(np.hstack([quadratic, linear, offset[:, None]]))
        self.row_quadratic = np.ascontiguousarray(quadratic.T)
        self.row_linear = np.ascontiguousarray(linear.T)
        self.row_offset = offset

    def work_size(self, rows: int) -> int:
        return (2 * self.d + 1) * rows

    def chunk(self, augmented: FloatArray, out: FloatArray, work: FloatArray) -> None:
        rows = augmented.shape[0]
        d = self.d
        features = work[: (2 * d + 1) * rows].reshape(2 * d + 1, rows)
        np.square(augmented[:, :d].T, out=features[:d])
        features[d:] = augmented.T
        np.matmul(self.coefficients, features, out=out)

    def rows(self, centered: FloatArray) -> FloatArray:
        out = (centered * centered) @ self.row_quadratic
        out += centered @ self.row_linear
        out += self.row_offset
        return out


class TiedKernel(Kernel):
    """Tied: whiten once by the shared factor, y = U^T x, then
    c_j + b_j.y - |y|^2 / 2 - |b_j|^2 / 2 with b_j = U^T mu_j."""

    def __init__(self, factor: FloatArray, centered_means: FloatArray,
                 constants: FloatArray) -> None:
        self.d = factor.shape[0]
        centers = centered_means @ factor
        offset = constants - 0.5 * (centers**2).sum(axis=1)
        self.factor_t = np.ascontiguousarray(factor.T)
        self.factor = np.ascontiguousarray(factor)
        self.centers_aug = np.ascontiguousarray(np.hstack([centers, offset[:, None]]))
        self.row_centers = np.ascontiguousarray(centers.T)
        self.row_offset = offset

    def work_size(self, rows: int) -> int:
        return (self.d + 1) * rows + rows

    def chunk(self, augmented: FloatArray, out: FloatArray, work: FloatArray) -> None:
        rows = augmented.shape[0]
        d = self.d
        whitened = work[: (d + 1) * rows].reshape(d + 1, rows)
        np.matmul(self.factor_t, augmented[:, :d].T, out=whitened[:d])
        whitened[d] = 1.0
        np.matmul(self.centers_aug, whitened, out=out)
        squares = whitened[:d]
        np.square(squares, out=squares)
        half_norms = work[(d + 1) * rows : (d + 2) * rows]
        np.sum(squares, axis=0, out=half_norms)
        half_norms *= 0.5
        out -= half_norms

    def rows(self, centered: FloatArray) -> FloatArray:
        whitened = centered @ self.factor
        out = whitened @ self.row_centers
        out += self.row_offset[None, :] - 0.5 * (whitened * whitened).sum(axis=1, keepdims=True)
        return out
