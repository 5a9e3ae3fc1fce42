"""Training log-density quantiles, and the tail fraction of new points.

A complete row is compared with the quantiles of the training rows' log-densities. A
row with missing features has a marginal log-density, on its observed features only:
it is compared with the same marginal of the sample of training rows kept with the
version. Scoring all of them for every new missing pattern cost 4.8 ms a pattern (k 8,
d 16), 9.6 s for a request of 2 000 distinct patterns, so the comparison is adaptive,
as sequential Monte Carlo p-values are (Besag and Clifford, 1991): first against a
pilot of PILOT_ROWS sample rows; where the pilot's band (the Dvoretzky-Kiefer-
Wolfowitz inequality with Massart's constant, at confidence 1 - PILOT_RISK) leaves
the tail possibly below SMALL_TAIL, against every sample row. Small tails, those that
raise alerts, are thus exactly the full-sample value; larger ones are within the
pilot's band of it.
"""

from __future__ import annotations

import bisect
import threading
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from ._validation import FloatArray, as_float_array

if TYPE_CHECKING:
    from ._mixture import Mixture

#: Quantiles kept per version: probabilities 0, 0.001, ..., 1.
QUANTILE_COUNT = 1001
#: Training rows kept with a fitted version (a uniform sample of them).
TRAINING_SAMPLE_ROWS = 20_000
#: Up to this many values, a tail fraction is looked up in Python (a bisection):
#: cheaper than the array calls for one scoring request of a point or a few.
FEW_POINTS = 8
#: Missing patterns whose quantiles one ``TailFractions`` keeps (least recently used go).
PATTERN_CACHE_SIZE = 64
#: Sample rows a missing pattern is first compared with, the tail below which the
#: whole sample decides, and the risk that the pilot misses such a tail.
PILOT_ROWS = 1000
SMALL_TAIL = 0.05
PILOT_RISK = 1e-3


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
        if x.size <= FEW_POINTS:  # a point or a few: in Python, without a dozen array calls
            return np.array([self._one(v) for v in x.ravel().tolist()]).reshape(x.shape)
        probabilities = np.linspace(0.0, 1.0, self.values.size)
        upper = np.searchsorted(self.values, x, side="right")
        inside = np.clip(upper, 1, self.values.size - 1)
        low, high = self.values[inside - 1], self.values[inside]
        p_low, p_high = probabilities[inside - 1], probabilities[inside]
        span = np.where(high > low, high - low, 1.0)
        fraction = p_low + np.clip((x - low) / span, 0.0, 1.0) * (p_high - p_low)
        fraction = np.where(upper == 0, 0.0, fraction)
        return np.where(upper >= self.values.size, 1.0, fraction)

    def _one(self, x: float) -> float:
        """``tail_fraction`` of one value (NaN sorts last, as in numpy)."""
        values = self._listed()
        last = len(values) - 1
        upper = bisect.bisect_right(values, x)
        if upper == 0:
            return 0.0
        if upper > last:
            return 1.0
        low, high = values[upper - 1], values[upper]
        span = high - low if high > low else 1.0
        return (upper - 1 + min(max((x - low) / span, 0.0), 1.0)) / last

    def _listed(self) -> list[float]:
        found: list[float] | None = self.__dict__.get("_list")
        if found is None:
            found = self.values.tolist()
            object.__setattr__(self, "_list", found)  # a cache on a frozen instance
        return found

    def to_dict(self) -> dict[str, Any]:
        return {"values": self.values.tolist(), "mean": self.mean}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> TrainingQuantiles:
        values = as_float_array(data["values"], "values")
        if values.ndim != 1 or values.size < 2 or (np.diff(values) < 0).any():
            raise ValueError("values must be a non-decreasing list of at least 2 numbers")
        return cls(values=values, mean=float(data["mean"]))


@dataclass(frozen=True)
class TrainingSample:
    """A uniform sample of training rows (m, d) and their frequency weights (m,)."""

    rows: FloatArray
    weights: FloatArray


def dkw_band(rows: float, risk: float) -> float:
    """Half-width of the band that holds an empirical CDF of ``rows`` independent draws
    everywhere with probability ``1 - risk``: P(sup |F_n - F| > e) <= 2 exp(-2 n e^2)
    (Dvoretzky, Kiefer and Wolfowitz, 1956; the constant 2 is Massart's, 1990)."""
    return float(np.sqrt(np.log(2.0 / risk) / (2.0 * rows)))


@dataclass
class TailFractions:
    """Tail fractions of rows, complete or not, for one fitted version.

    Complete rows use ``quantiles``; a row with missing features uses the quantiles of
    the marginal log-density, on its observed features, of the training ``sample``:
    of a pilot of it, or of all of it where the tail may be small (see the module);
    each pattern's tables are computed on first use, the last PATTERN_CACHE_SIZE kept.
    Without a sample such rows get NaN.
    """

    mixture: Mixture
    quantiles: TrainingQuantiles
    sample: TrainingSample | None
    _patterns: OrderedDict[tuple[bytes, bool], TrainingQuantiles] = field(
        default_factory=OrderedDict, repr=False)
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def __post_init__(self) -> None:
        self._pilot: TrainingSample | None = None
        if self.sample is not None:
            # A fixed draw: the same request gets the same answer.
            rows = self.sample.rows
            chosen = np.random.default_rng(0).permutation(len(rows))[:PILOT_ROWS]
            self._pilot = TrainingSample(rows[chosen], self.sample.weights[chosen])
            weights = self._pilot.weights
            effective = weights.sum() ** 2 / max(float((weights**2).sum()), 1e-300)
            self._band = dkw_band(effective, PILOT_RISK) if len(chosen) < len(rows) else 0.0

    @property
    def rows_per_pattern(self) -> int:
        """Training rows scored for a missing pattern's first use (its pilot)."""
        return 0 if self._pilot is None else len(self._pilot.rows)

    @property
    def nbytes(self) -> int:
        """Its memory at most: the tables, the sample and every pattern kept."""
        table = self.quantiles.values.nbytes
        if self.sample is None or self._pilot is None:
            return table
        return (table * (1 + PATTERN_CACHE_SIZE) + self.sample.rows.nbytes
                + self.sample.weights.nbytes + self._pilot.rows.nbytes)

    def __call__(self, X: FloatArray, log_density: FloatArray) -> FloatArray:
        """(n,) tail fractions of rows ``X`` (NaN marks a missing feature) whose
        log-densities (marginal where features are missing) are ``log_density``."""
        missing = np.isnan(X)
        incomplete = missing.any(axis=1)
        tail = self.quantiles.tail_fraction(log_density)
        if not incomplete.any():
            return tail
        tail[incomplete] = np.nan
        if self.sample is None:
            return tail
        rows = np.flatnonzero(incomplete)
        patterns, inverse = np.unique(missing[rows], axis=0, return_inverse=True)
        for index, pattern in enumerate(patterns):
            if pattern.all():
                continue
            members = rows[inverse.reshape(-1) == index]
            tail[members] = self._pattern_tails(pattern, log_density[members])
        return tail

    def _pattern_tails(self, missing: np.ndarray, log_density: FloatArray) -> FloatArray:
        """The pilot's answer, or the whole sample's where the tail may be small."""
        found = self.for_pattern(missing, whole=False).tail_fraction(log_density)
        if self._band == 0.0:
            return found
        uncertain = found - self._band < SMALL_TAIL
        if uncertain.any():
            found[uncertain] = self.for_pattern(missing, whole=True).tail_fraction(
                log_density[uncertain])
        return found

    def for_pattern(self, missing: np.ndarray, whole: bool = True) -> TrainingQuantiles:
        """The training quantiles of the marginal on the features ``missing`` leaves:
        of the whole sample, or of its pilot."""
        assert self.sample is not None and self._pilot is not None
        key = (np.packbits(missing).tobytes(), whole)
        with self._lock:
            found = self._patterns.get(key)
            if found is not None:
                self._patterns.move_to_end(key)
                return found
        rows = self.sample if whole else self._pilot
        values = self.mixture.marginal_log_density(rows.rows, missing)
        found = TrainingQuantiles.from_log_densities(values, rows.weights)
        with self._lock:
            self._patterns[key] = found
            while len(self._patterns) > PATTERN_CACHE_SIZE:
                self._patterns.popitem(last=False)
        return found
