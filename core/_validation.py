"""Checks at the public edge: they raise ValueError naming the argument."""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

FloatArray = NDArray[np.float64]

#: Tolerance on ``|sum(weights) - 1|`` for imported parameter sets.
WEIGHT_SUM_TOLERANCE = 1e-6
#: Tolerance on ``|S - S.T|`` relative to ``max |S|`` for covariance matrices.
SYMMETRY_TOLERANCE = 1e-8

STRUCTURES = ("full", "diagonal", "spherical", "shared")


def check_structure(structure: object) -> str:
    if structure not in STRUCTURES:
        raise ValueError(f"structure must be one of {', '.join(STRUCTURES)}; got {structure!r}")
    return str(structure)


def as_float_array(value: Any, name: str) -> FloatArray:
    try:
        array = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError) as error:
        raise ValueError(f"{name} must be an array of numbers ({error})") from None
    return array


def check_shape(array: FloatArray, shape: tuple[int, ...], name: str) -> None:
    if array.shape != shape:
        raise ValueError(f"{name} must have shape {shape}; got {array.shape}")


def check_finite(array: FloatArray, name: str) -> None:
    if not np.isfinite(array).all():
        where = tuple(int(i) for i in np.argwhere(~np.isfinite(array))[0])
        raise ValueError(f"{name} must be finite; {name}{list(where)} is {array[where]}")


def check_weights(weights: FloatArray) -> FloatArray:
    """Return the weights, renormalised when their sum is off by more than rounding."""
    check_finite(weights, "weights")
    if (weights < 0).any():
        j = int(np.argmax(weights < 0))
        raise ValueError(f"weights must be non-negative; weights[{j}] is {weights[j]}")
    total = float(weights.sum())
    if abs(total - 1.0) > WEIGHT_SUM_TOLERANCE:
        raise ValueError(
            f"weights must sum to 1 (within {WEIGHT_SUM_TOLERANCE:g}); they sum to {total!r}"
        )
    # Leave weights that already sum to 1 up to rounding bit for bit (exact round trips).
    return weights if abs(total - 1.0) <= 8 * np.finfo(float).eps else weights / total


def as_points(X: Any, dimension: int, name: str = "X") -> FloatArray:
    """A (n, d) array of points; NaN marks a missing entry and is allowed here."""
    if type(X) is not np.ndarray or X.dtype != np.float64:
        X = as_float_array(X, name)
    if X.ndim != 2:
        raise ValueError(f"{name} must be 2-D (n, {dimension}); got shape {X.shape}")
    if X.shape[1] != dimension:
        raise ValueError(f"{name} must have {dimension} columns (the dimension); got {X.shape[1]}")
    return X


def check_no_infinite(X: FloatArray, name: str = "X", rows: np.ndarray | None = None) -> None:
    """Raise naming the first infinite entry; ``rows`` maps X's rows to the caller's
    numbering when X is a subset."""
    infinite = np.isinf(X)
    if infinite.any():
        row, column = (int(i) for i in np.argwhere(infinite)[0])
        row = row if rows is None else int(rows[row])
        raise ValueError(f"{name} must not contain infinite values; {name}[{row}, {column}] is inf")


def check_positive_int(value: object, name: str, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < minimum:
        raise ValueError(f"{name} must be an integer >= {minimum}; got {value!r}")
    return int(value)


def check_non_negative(value: object, name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not value >= 0:
        raise ValueError(f"{name} must be a non-negative number; got {value!r}")
    return float(value)
