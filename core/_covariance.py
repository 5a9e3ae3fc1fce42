"""One covariance interface for the four structures.

Each structure stores its parameters in its own shape (``full`` (k, d, d),
``diagonal`` (k, d), ``spherical`` (k,), ``shared`` (d, d)) and offers the same
operations: log-determinants, a scoring kernel built on the Cholesky factors of
the precision matrices, sampling, marginals, Gaussian regression coefficients
for conditioning, and the M-step: each block's weighted second moments (in a form
that adds across blocks) and the estimate from their sum, held above per-component
floors. No explicit inverse is ever formed: precision factors come from triangular
solves.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from typing import ClassVar

import numpy as np
from scipy.linalg import cho_factor, cho_solve
from scipy.linalg.lapack import dtrtri

from ._kernels import ExpandedKernel, Kernel, ProjectedKernel, SharedKernel
from ._validation import SYMMETRY_TOLERANCE, FloatArray, as_float_array, check_finite, check_shape

IntArray = np.ndarray


def _cholesky_lower(matrices: FloatArray, stacked: bool = True) -> FloatArray:
    """Lower Cholesky factors of a stack of SPD matrices, naming the first that is not."""
    try:
        return np.asarray(np.linalg.cholesky(matrices), dtype=np.float64)
    except np.linalg.LinAlgError:
        for j, matrix in enumerate(matrices):
            try:
                np.linalg.cholesky(matrix)
            except np.linalg.LinAlgError:
                where = f"covariances[{j}]" if stacked else "covariances"
                raise ValueError(f"{where} is not positive definite") from None
        raise


def _check_symmetric(matrices: FloatArray, stacked: bool = True) -> None:
    scale = np.abs(matrices).max(axis=(1, 2))
    asymmetry = np.abs(matrices - matrices.transpose(0, 2, 1)).max(axis=(1, 2))
    bad = asymmetry > SYMMETRY_TOLERANCE * scale
    if bad.any():
        where = f"covariances[{int(np.argmax(bad))}]" if stacked else "covariances"
        raise ValueError(
            f"{where} must be symmetric (within {SYMMETRY_TOLERANCE:g} of its largest entry)"
        )


def _precision_factors(lower: FloatArray) -> FloatArray:
    """Upper factors U with precision = U U^T, from covariance = L L^T (U = L^-T).

    LAPACK's triangular inverse: scipy's solve_triangular ran even a 4 x 4 solve on
    OpenBLAS's threads, which left a worker spinning for 0.1 s after each model load
    and each marginal (tests/core/test_threads.py)."""
    return np.stack([dtrtri(L, lower=1)[0].T for L in lower])


def _floor_eigenvalues(
    matrices: FloatArray, floor: FloatArray
) -> tuple[FloatArray, np.ndarray]:
    """Raise each eigenvalue of F^-1/2 S F^-1/2 to at least 1, with F = diag(floor[j]).

    ``matrices`` (k, d, d), ``floor`` (k, d). Returns the floored matrices and, per
    component and feature, whether the feature takes part in a direction that was
    below its floor (a squared loading at least half the direction's largest).
    """
    scale = np.sqrt(floor)
    standard = matrices / scale[:, :, None] / scale[:, None, :]
    values, vectors = np.linalg.eigh(standard)
    below = values < 1.0
    if not below.any():
        return matrices, np.zeros(floor.shape, dtype=bool)
    loads = vectors**2
    strong = loads >= 0.5 * loads.max(axis=1, keepdims=True)
    low = (strong & below[:, None, :]).any(axis=2)
    rebuilt = (vectors * np.maximum(values, 1.0)[:, None, :]) @ vectors.transpose(0, 2, 1)
    clipped = below.any(axis=1)
    matrices = matrices.copy()
    matrices[clipped] = (rebuilt * scale[:, :, None] * scale[:, None, :])[clipped]
    return matrices, low


def _packed_products(centered: FloatArray, out: FloatArray) -> FloatArray:
    """Row products x_a x_b (a <= b) of a (d, c) block, packed row-major as (d(d+1)/2, c).

    One product per pair and row: the weighted second moments of every component are
    then one (k, c) @ (c, d(d+1)/2) GEMM, half the work of (k d, c) @ (c, d).
    """
    d, c = centered.shape
    products = out[: d * (d + 1) // 2 * c].reshape(d * (d + 1) // 2, c)
    start = 0
    for a in range(d):
        np.multiply(centered[a], centered[a:], out=products[start : start + d - a])
        start += d - a
    return products


def unpack_symmetric(packed: FloatArray, d: int) -> FloatArray:
    """(..., d(d+1)/2) upper triangles, row-major, to (..., d, d) symmetric matrices."""
    upper = np.triu_indices(d)
    full = np.zeros((*packed.shape[:-1], d, d))
    full[..., upper[0], upper[1]] = packed
    full[..., upper[1], upper[0]] = packed
    return full


class Covariance(ABC):
    """Covariances of k components in d dimensions, in one of four structures."""

    structure: ClassVar[str]
    array: FloatArray
    components: int
    dimension: int

    def __init__(self, array: FloatArray, components: int, dimension: int) -> None:
        self.array = array
        self.components = components
        self.dimension = dimension

    @classmethod
    def validated(cls, value: object, components: int, dimension: int) -> Covariance:
        array = as_float_array(value, "covariances")
        check_shape(array, cls.expected_shape(components, dimension), "covariances")
        check_finite(array, "covariances")
        covariance = cls(array.copy(), components, dimension)
        covariance.check()
        return covariance

    @staticmethod
    @abstractmethod
    def expected_shape(components: int, dimension: int) -> tuple[int, ...]: ...

    @staticmethod
    @abstractmethod
    def parameter_count(components: int, dimension: int) -> int: ...

    @staticmethod
    @abstractmethod
    def min_points(dimension: int) -> float:
        """Effective points below which a component is taken as collapsing."""

    @abstractmethod
    def check(self) -> None:
        """Raise ValueError unless every covariance is positive definite."""

    @abstractmethod
    def log_det(self) -> FloatArray:
        """Log-determinant of each component's covariance, shape (k,)."""

    @abstractmethod
    def kernel(self, means: FloatArray, constants: FloatArray, center: FloatArray,
               shift: float) -> Kernel:
        """The log-joint kernel with per-component ``constants`` (see _kernels)."""

    @abstractmethod
    def scale_noise(self, noise: FloatArray, component: IntArray) -> FloatArray:
        """Turn standard normal rows into draws with each row's component covariance."""

    @abstractmethod
    def marginal(self, features: IntArray) -> Covariance: ...

    @abstractmethod
    def precisions(self) -> FloatArray:
        """Each component's precision matrix, (k, d, d), from the Cholesky factors."""

    def regression(self, observed: IntArray, missing: IntArray) -> FloatArray | None:
        """Coefficients B with E[x_m | x_o] = mu_m + B (x_o - mu_o), shape (k, m, o).

        None when the structure makes x_m independent of x_o (diagonal, spherical).
        """
        return None

    @classmethod
    @abstractmethod
    def from_matrix(cls, matrix: FloatArray, components: int) -> Covariance:
        """Every component given the one (d, d) covariance, in this structure."""

    def replaced(self, indices: IntArray, other: Covariance) -> Covariance:
        """A copy whose listed components come from ``other`` (same structure and k)."""
        array = self.array.copy()
        array[indices] = other.array[indices]
        return type(self)(array, self.components, self.dimension)

    def scaled(self, scale: FloatArray) -> Covariance:
        """The covariances of rows multiplied feature by feature by ``scale`` (d,)
        (one value repeated, for spherical)."""
        return type(self)(self.array * np.outer(scale, scale), self.components,
                          self.dimension)

    @staticmethod
    @abstractmethod
    def work_size(components: int, dimension: int, rows: int) -> int:
        """Float64 values of scratch space ``second_moments`` needs for a block."""

    @staticmethod
    @abstractmethod
    def second_moments(
        resp: FloatArray, centered: FloatArray, work: FloatArray
    ) -> FloatArray:
        """A block's weighted second moments, resp (k, c) by the centred block (d, c),
        in this structure's additive form (summed over blocks, read by ``estimate``)."""

    @classmethod
    @abstractmethod
    def estimate(
        cls, counts: FloatArray, means: FloatArray, second: FloatArray, ridge: float,
        floor: FloatArray,
    ) -> tuple[Covariance, np.ndarray]:
        """M-step from summed statistics: the data's covariances held above ``floor``
        (k, d) in every direction, then ``ridge`` added to the diagonal. Also returns,
        per component and feature, where the data's spread was below the floor."""


class FullCovariance(Covariance):
    structure = "full"

    @staticmethod
    def expected_shape(components: int, dimension: int) -> tuple[int, ...]:
        return (components, dimension, dimension)

    @staticmethod
    def parameter_count(components: int, dimension: int) -> int:
        return components * dimension * (dimension + 1) // 2

    @staticmethod
    def min_points(dimension: int) -> float:
        return dimension + 1.0

    def check(self) -> None:
        _check_symmetric(self.array)
        self._lower()

    def _lower(self) -> FloatArray:
        if not hasattr(self, "_lower_cache"):
            self._lower_cache = _cholesky_lower(self.array)
        return self._lower_cache

    def log_det(self) -> FloatArray:
        return 2.0 * np.log(np.diagonal(self._lower(), axis1=1, axis2=2)).sum(axis=1)

    def kernel(self, means: FloatArray, constants: FloatArray, center: FloatArray,
               shift: float) -> Kernel:
        factors = _precision_factors(self._lower())
        return ProjectedKernel(factors, means, constants, center, shift)

    def scale_noise(self, noise: FloatArray, component: IntArray) -> FloatArray:
        # Row by component: gathering a factor per row would take n d^2 values.
        lower = self._lower()
        scaled = np.empty_like(noise)
        for j in np.unique(component):
            rows = component == j
            scaled[rows] = noise[rows] @ lower[j].T
        return scaled

    def marginal(self, features: IntArray) -> Covariance:
        array = self.array[:, features][:, :, features]
        return FullCovariance(array, self.components, len(features))

    def precisions(self) -> FloatArray:
        factors = _precision_factors(self._lower())
        return np.asarray(factors @ factors.transpose(0, 2, 1))

    def regression(self, observed: IntArray, missing: IntArray) -> FloatArray | None:
        return np.stack([_regression(matrix, observed, missing) for matrix in self.array])

    @classmethod
    def from_matrix(cls, matrix: FloatArray, components: int) -> Covariance:
        d = matrix.shape[0]
        return cls(np.repeat(matrix[None], components, axis=0), components, d)

    @staticmethod
    def work_size(components: int, dimension: int, rows: int) -> int:
        return dimension * (dimension + 1) // 2 * rows

    @staticmethod
    def second_moments(resp: FloatArray, centered: FloatArray, work: FloatArray) -> FloatArray:
        """(k, d(d+1)/2): each component's upper triangle, packed."""
        return resp @ _packed_products(centered, work).T

    @classmethod
    def estimate(
        cls, counts: FloatArray, means: FloatArray, second: FloatArray, ridge: float,
        floor: FloatArray,
    ) -> tuple[Covariance, np.ndarray]:
        k, d = means.shape
        matrices = (unpack_symmetric(second, d) / counts[:, None, None]
                    - means[:, :, None] * means[:, None, :])
        matrices, low = _floor_eigenvalues(matrices, floor)
        matrices[:, np.arange(d), np.arange(d)] += ridge
        return cls(matrices, k, d), low


class DiagonalCovariance(Covariance):
    structure = "diagonal"

    @staticmethod
    def expected_shape(components: int, dimension: int) -> tuple[int, ...]:
        return (components, dimension)

    @staticmethod
    def parameter_count(components: int, dimension: int) -> int:
        return components * dimension

    @staticmethod
    def min_points(dimension: int) -> float:
        return 2.0

    def check(self) -> None:
        if (self.array <= 0).any():
            j, a = (int(i) for i in np.argwhere(self.array <= 0)[0])
            raise ValueError(f"covariances[{j}, {a}] must be a positive variance")

    def _variances(self) -> FloatArray:
        return self.array

    def log_det(self) -> FloatArray:
        return np.log(self._variances()).sum(axis=1)

    def kernel(self, means: FloatArray, constants: FloatArray, center: FloatArray,
               shift: float) -> Kernel:
        return ExpandedKernel(1.0 / self._variances(), means, constants, center, shift)

    def scale_noise(self, noise: FloatArray, component: IntArray) -> FloatArray:
        return noise * np.sqrt(self._variances()[component])

    def marginal(self, features: IntArray) -> Covariance:
        return DiagonalCovariance(self.array[:, features], self.components, len(features))

    def precisions(self) -> FloatArray:
        return np.einsum("kd,de->kde", 1.0 / self._variances(), np.eye(self.dimension))

    @classmethod
    def from_matrix(cls, matrix: FloatArray, components: int) -> Covariance:
        d = matrix.shape[0]
        return cls(np.repeat(np.diagonal(matrix)[None], components, axis=0), components, d)

    def scaled(self, scale: FloatArray) -> Covariance:
        return type(self)(self.array * scale**2, self.components, self.dimension)

    @staticmethod
    def work_size(components: int, dimension: int, rows: int) -> int:
        return dimension * rows

    @staticmethod
    def second_moments(resp: FloatArray, centered: FloatArray, work: FloatArray) -> FloatArray:
        squares = work[: centered.size].reshape(centered.shape)
        np.square(centered, out=squares)
        return resp @ squares.T

    @classmethod
    def estimate(
        cls, counts: FloatArray, means: FloatArray, second: FloatArray, ridge: float,
        floor: FloatArray,
    ) -> tuple[Covariance, np.ndarray]:
        k, d = means.shape
        variances = second / counts[:, None] - means**2
        low = variances < floor
        return cls(np.maximum(variances, floor) + ridge, k, d), low


class SphericalCovariance(DiagonalCovariance):
    structure = "spherical"

    @staticmethod
    def expected_shape(components: int, dimension: int) -> tuple[int, ...]:
        return (components,)

    @staticmethod
    def parameter_count(components: int, dimension: int) -> int:
        return components

    def check(self) -> None:
        if (self.array <= 0).any():
            j = int(np.argmax(self.array <= 0))
            raise ValueError(f"covariances[{j}] must be a positive variance")

    def _variances(self) -> FloatArray:
        return np.broadcast_to(self.array[:, None], (self.components, self.dimension))

    def marginal(self, features: IntArray) -> Covariance:
        return SphericalCovariance(self.array, self.components, len(features))

    def scaled(self, scale: FloatArray) -> Covariance:
        return SphericalCovariance(self.array * scale[0] ** 2, self.components,
                                   self.dimension)

    @classmethod
    def from_matrix(cls, matrix: FloatArray, components: int) -> Covariance:
        d = matrix.shape[0]
        return cls(np.full(components, np.diagonal(matrix).mean()), components, d)

    @classmethod
    def estimate(
        cls, counts: FloatArray, means: FloatArray, second: FloatArray, ridge: float,
        floor: FloatArray,
    ) -> tuple[Covariance, np.ndarray]:
        k, d = means.shape
        variances = (second / counts[:, None] - means**2).mean(axis=1)
        lowest = floor.mean(axis=1)
        low = np.repeat((variances < lowest)[:, None], d, axis=1)
        return cls(np.maximum(variances, lowest) + ridge, k, d), low


class SharedCovariance(Covariance):
    structure = "shared"

    @staticmethod
    def expected_shape(components: int, dimension: int) -> tuple[int, ...]:
        return (dimension, dimension)

    @staticmethod
    def parameter_count(components: int, dimension: int) -> int:
        return dimension * (dimension + 1) // 2

    @staticmethod
    def min_points(dimension: int) -> float:
        return 1.0

    def check(self) -> None:
        _check_symmetric(self.array[None], stacked=False)
        self._lower()

    def _lower(self) -> FloatArray:
        if not hasattr(self, "_lower_cache"):
            self._lower_cache = _cholesky_lower(self.array[None], stacked=False)[0]
        return self._lower_cache

    def log_det(self) -> FloatArray:
        value = 2.0 * np.log(np.diagonal(self._lower())).sum()
        return np.full(self.components, value)

    def kernel(self, means: FloatArray, constants: FloatArray, center: FloatArray,
               shift: float) -> Kernel:
        factor = _precision_factors(self._lower()[None])[0]
        return SharedKernel(factor, means, constants, center, shift)

    def scale_noise(self, noise: FloatArray, component: IntArray) -> FloatArray:
        return noise @ self._lower().T

    def marginal(self, features: IntArray) -> Covariance:
        return SharedCovariance(self.array[features][:, features], self.components, len(features))

    def precisions(self) -> FloatArray:
        factor = _precision_factors(self._lower()[None])[0]
        return np.broadcast_to(factor @ factor.T, (self.components, self.dimension,
                                                   self.dimension))

    def regression(self, observed: IntArray, missing: IntArray) -> FloatArray | None:
        coefficients = _regression(self.array, observed, missing)
        return np.broadcast_to(coefficients, (self.components, *coefficients.shape))

    @classmethod
    def from_matrix(cls, matrix: FloatArray, components: int) -> Covariance:
        return cls(matrix.copy(), components, matrix.shape[0])

    def replaced(self, indices: IntArray, other: Covariance) -> Covariance:
        return self  # shared by all components: nothing belongs to one of them

    @staticmethod
    def work_size(components: int, dimension: int, rows: int) -> int:
        return dimension * (dimension + 1) // 2 * rows

    @staticmethod
    def second_moments(resp: FloatArray, centered: FloatArray, work: FloatArray) -> FloatArray:
        """(d(d+1)/2,): the pooled upper triangle, packed."""
        return resp.sum(axis=0) @ _packed_products(centered, work).T

    @classmethod
    def estimate(
        cls, counts: FloatArray, means: FloatArray, second: FloatArray, ridge: float,
        floor: FloatArray,
    ) -> tuple[Covariance, np.ndarray]:
        k, d = means.shape
        between = (means.T * counts) @ means
        matrix = (unpack_symmetric(second, d) - between) / counts.sum()
        # One matrix for all: held above the highest floor any component has.
        floored, low = _floor_eigenvalues(matrix[None], floor.max(axis=0)[None])
        floored[0][np.arange(d), np.arange(d)] += ridge
        return cls(floored[0], k, d), np.repeat(low, k, axis=0)


def _regression(matrix: FloatArray, observed: IntArray, missing: IntArray) -> FloatArray:
    """Sigma_mo Sigma_oo^-1 by a Cholesky solve."""
    factor = cho_factor(matrix[np.ix_(observed, observed)], lower=True)
    return cho_solve(factor, matrix[np.ix_(observed, missing)]).T


COVARIANCES: dict[str, type[Covariance]] = {
    cls.structure: cls
    for cls in (FullCovariance, DiagonalCovariance, SphericalCovariance, SharedCovariance)
}


def covariance_class(structure: str) -> type[Covariance]:
    return COVARIANCES[structure]
