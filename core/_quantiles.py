"""Training log-density quantiles, and the tail fraction of new points."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ._validation import FloatArray, as_float_array

#: Quantiles kept per version: probabilities 0, 0.001, ..., 1.
QUANTILE_COUNT = 1001


@dataclass(frozen=True)
class TrainingQuantiles:
    """A compact table of the training points' log-densities.

    ``values[i]`` is the log-density below which a fraction ``i / (len(values) - 1)``
    of the (weighted) training points lie; ``mean`` is their weighted mean.

    Examples
    --------
    >>> table = TrainingQuantiles.from_log_densities([-3.0, -2.0, -1.0], size=3)
    >>> table.tail_fraction([-3.5, -1.5, 0.0]).tolist()
    [0.0, 0.75, 1.0]
    """

    values: FloatArray
    mean: float

    @classmethod
    def from_log_densities(
        cls, log_densities: Any, weights: Any = None, size: int = QUANTILE_COUNT
    ) -> TrainingQuantiles:
        values = as_float_array(log_densities, "log_densities").ravel()
        w = np.ones_like(values) if weights is None else as_float_array(weights, "weights")
        keep = w > 0
        values, w = values[keep], w[keep]
        if values.size == 0 or not np.isfinite(values).all():
            raise ValueError("log_densities must be finite with at least one positive weight")
        order = np.argsort(values, kind="stable")
        values, w = values[order], w[order]
        # Plotting positions (i + 1/2) / n, generalised so that a weight of m spans the
        # positions of m repeated copies: a flat run from C_prev + 1/2 to C - 1/2.
        cumulative = np.cumsum(w)
        half = 0.5 * np.minimum(w, 1.0)
        knots = np.column_stack([cumulative - w + half, cumulative - half]).ravel() / w.sum()
        table = np.interp(np.linspace(0.0, 1.0, size), knots, np.repeat(values, 2))
        return cls(values=table, mean=float(w @ values / w.sum()))

    def tail_fraction(self, log_density: Any) -> FloatArray:
        """Fraction of training points with a lower log-density, interpolated."""
        x = np.asarray(log_density, dtype=np.float64)
        probabilities = np.linspace(0.0, 1.0, self.values.size)
        upper = np.searchsorted(self.values, x, side="right")
        inside = np.clip(upper, 1, self.values.size - 1)
        low, high = self.values[inside - 1], self.values[inside]
        p_low, p_high = probabilities[inside - 1], probabilities[inside]
        span = np.where(high > low, high - low, 1.0)
        fraction = p_low + np.clip((x - low) / span, 0.0, 1.0) * (p_high - p_low)
        fraction = np.where(upper == 0, 0.0, fraction)
        return np.where(upper >= self.values.size, 1.0, fraction)

    def to_dict(self) -> dict[str, Any]:
        return {"values": self.values.tolist(), "mean": self.mean}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> TrainingQuantiles:
        values = as_float_array(data["values"], "values")
        if values.ndim != 1 or values.size < 2 or (np.diff(values) < 0).any():
            raise ValueError("values must be a non-decreasing list of at least 2 numbers")
        return cls(values=values, mean=float(data["mean"]))
