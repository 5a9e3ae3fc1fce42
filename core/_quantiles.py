"""Training log-density quantiles, and the tail fraction of new points.

A complete row is compared with the quantiles of the training rows' log-densities. A
row with missing features has a marginal log-density, on its observed features only:
it is compared with the same marginal of the sample of training rows kept with the
version. Scoring all of them for every new missing pattern cost 4.8 ms a pattern (k 8,
d 16), 9.6 s for a request of 2 000 distinct patterns, so the comparison is adaptive,
as sequential Monte Carlo p-values are (Besag and Clifford, 1991): first against a
pilot of PILOT_ROWS sample rows; where the pilot's fraction is low enough that the
tail may be below SMALL_TAIL (the binomial test at risk PILOT_RISK), against every
sample row that could be below it. Small tails, those that raise alerts, are thus
the full-sample value, but with probability PILOT_RISK; larger ones are within the
pilot's band of it (``dkw_band``: the Dvoretzky-Kiefer-Wolfowitz inequality with
Massart's constant). Patterns are scored together, each block factorised once, and
the pilot's rows are prepared so that a pattern costs by the fewer of its missing and
its observed features (``_incomplete``).
"""

from __future__ import annotations

import bisect
import itertools
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import stats

from ._incomplete import PreparedRows
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
#: Sample rows a missing pattern is first compared with, the tail below which the
#: whole sample decides, and the risk that the pilot misses such a tail.
PILOT_ROWS = 1000
SMALL_TAIL = 0.05
PILOT_RISK = 1e-3
#: Patterns scored on the pilot, and rows compared with it, at once.
AT_ONCE = 4096
#: The most memory the pilot's prepared rows may take (8 k d PILOT_ROWS bytes: 1 MiB
#: at k 8, d 16); beyond it the pilot is scored from its rows alone.
PREPARED_BYTES = 16 * 2**20


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


def refinement_threshold(rows: float) -> float:
    """The pilot fraction below which a tail may be small: a tail below SMALL_TAIL shows
    a pilot fraction of at least this with probability PILOT_RISK at most (the upper
    binomial quantile, ``rows`` draws)."""
    return float(stats.binom.ppf(1.0 - PILOT_RISK, max(1, round(rows)), SMALL_TAIL)
                 / max(1, round(rows)))


def dkw_band(rows: float, risk: float) -> float:
    """Half-width of the band that holds an empirical CDF of ``rows`` independent draws
    everywhere with probability ``1 - risk``: P(sup |F_n - F| > e) <= 2 exp(-2 n e^2)
    (Dvoretzky, Kiefer and Wolfowitz, 1956; the constant 2 is Massart's, 1990)."""
    return float(np.sqrt(np.log(2.0 / risk) / (2.0 * rows)))


@dataclass
class TailFractions:
    """Tail fractions of rows, complete or not, for one fitted version.

    Complete rows use ``quantiles``. A row with missing features gets the weighted
    fraction of the training ``sample`` whose marginal log-density, on the features
    the row observes, is lower than the row's: from the pilot, or from every sample
    row where the tail may be small (see the module). Without a sample such rows get
    NaN.
    """

    mixture: Mixture
    quantiles: TrainingQuantiles
    sample: TrainingSample | None

    def __post_init__(self) -> None:
        #: Below this pilot fraction the whole sample decides (never, with no pilot).
        self._refine_below = -1.0
        if self.sample is None:
            return
        rows, weights = self.sample.rows, self.sample.weights
        # A fixed draw: the same request gets the same answer.
        chosen = np.random.default_rng(0).permutation(len(rows))[:PILOT_ROWS]
        self._pilot = TrainingSample(rows[chosen], weights[chosen])
        # Prepared, a pattern missing fewer features than it observes costs less on the
        # pilot; only full and shared covariances gain from it.
        self._scored: FloatArray | PreparedRows = self._pilot.rows
        prepared_bytes = 8 * self.mixture.components * self.mixture.dimension * len(chosen)
        if self.mixture.structure in ("full", "shared") and prepared_bytes <= PREPARED_BYTES:
            self._scored = self.mixture.prepare(self._pilot.rows)
        if len(chosen) < len(rows):
            self._refine_below = refinement_threshold(self._pilot_rows())
        # Each sample row's log-joint per component (k, m): minus the most the
        # component's missing features can add, a lower bound of its marginal
        # log-density, which leaves only the rows that can fall below a small tail's
        # threshold.
        self._joints = np.ascontiguousarray(self.mixture.log_joints(rows).T)

    @property
    def pilot_band(self) -> float:
        """How far, at most, an answer from the pilot is from the full-sample value,
        but with probability PILOT_RISK (0 when the pilot is the whole sample)."""
        if self.sample is None or len(self._pilot.rows) == len(self.sample.rows):
            return 0.0
        return dkw_band(self._pilot_rows(), PILOT_RISK)

    def _pilot_rows(self) -> float:
        """The pilot's effective number of rows, (sum w)^2 / sum w^2 (its weights)."""
        weights = self._pilot.weights
        return float(weights.sum() ** 2 / max(float((weights**2).sum()), 1e-300))

    @property
    def rows_per_pattern(self) -> int:
        """Training rows scored for a missing pattern (its pilot), about."""
        return 0 if self.sample is None else len(self._pilot.rows)

    @property
    def nbytes(self) -> int:
        """Its memory: the table, the sample, its pilot (prepared) and the sample's
        log-joints."""
        table = self.quantiles.values.nbytes
        if self.sample is None:
            return table
        return (table + self.sample.rows.nbytes + self.sample.weights.nbytes
                + self._scored.nbytes + self._joints.nbytes)

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
        rows = np.flatnonzero(incomplete & ~missing.all(axis=1))
        patterns, inverse = np.unique(missing[rows], axis=0, return_inverse=True)
        tail[rows] = self._incomplete(patterns, inverse.reshape(-1), log_density[rows])
        return tail

    def _incomplete(self, patterns: np.ndarray, inverse: np.ndarray,
                    log_density: FloatArray) -> FloatArray:
        weights = self._pilot.weights / self._pilot.weights.sum()
        found = np.empty(log_density.size)
        # Patterns, and their rows, AT_ONCE at a time: the pilot's log-densities under
        # each pattern and a row's comparisons with them stay AT_ONCE x PILOT_ROWS.
        order = np.argsort(inverse, kind="stable")
        bounds = np.searchsorted(inverse[order], np.arange(0, len(patterns) + AT_ONCE,
                                                           AT_ONCE))
        for first, (low, high) in enumerate(itertools.pairwise(bounds)):
            pilot = self.mixture.marginal_log_densities(
                self._scored, patterns[first * AT_ONCE : (first + 1) * AT_ONCE])
            for start in range(low, high, AT_ONCE):
                rows = order[start : min(start + AT_ONCE, high)]
                found[rows] = (pilot[inverse[rows] - first * AT_ONCE]
                               < log_density[rows, None]) @ weights
        uncertain = found < self._refine_below
        if not uncertain.any():
            return found
        for pattern in np.unique(inverse[uncertain]):
            members = np.flatnonzero(uncertain & (inverse == pattern))
            found[members] = self._whole_sample(patterns[pattern], log_density[members])
        return found

    def _whole_sample(self, missing: np.ndarray, log_density: FloatArray) -> FloatArray:
        """The fraction of every sample row, weighted, below each of ``log_density``
        (one missing pattern): only rows whose own log-density could put them below."""
        assert self.sample is not None
        peaks = self.mixture.log_conditional_peaks(missing[None])[0]
        bound = (self._joints - peaks[:, None]).max(axis=0)
        candidates = np.flatnonzero(bound < log_density.max())
        values = self.mixture.marginal_log_densities(self.sample.rows[candidates],
                                                     missing[None])[0]
        weights = self.sample.weights[candidates]
        if log_density.size <= FEW_POINTS:  # cheaper than sorting the values
            below = (values < log_density[:, None]) @ weights
        else:  # sorted once: each row's count is a search, whatever the number of rows
            order = np.argsort(values)
            cumulative = np.concatenate([[0.0], np.cumsum(weights[order])])
            below = cumulative[np.searchsorted(values[order], log_density, side="left")]
        return below / self.sample.weights.sum()
