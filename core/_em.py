"""Expectation-maximisation for Gaussian mixtures, one pass over the data per iteration.

The E-step and the M-step meet in sufficient statistics (per-component weight,
first and second moments) accumulated chunk by chunk, so the same code fits an
array or a source too large for memory. All moments are taken about the data
mean, which keeps ``E[x x^T] - m m^T`` accurate for data far from the origin.

Guards against degenerate solutions (a component collapsing onto a few points
makes the likelihood unbounded):

* a variance floor relative to each feature's variance in the data: eigenvalues
  of the covariance in the metric of ``variance_floor * var(data)`` are kept >= 1;
* a component whose effective number of points drops below its minimum
  (d + 1 for full, 2 for diagonal and spherical, 1 for shared) or that needed the
  floor is re-seeded on a random training row with the data covariance;
* past ``MAX_RESEEDS`` re-seeds EM goes on with the floor holding the collapsing
  component (a bounded fit, for example of a sensor stuck at one value) and the
  restart is marked degenerate; the best non-degenerate restart wins over any
  degenerate one.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._covariance import Covariance, covariance_class
from ._data import ChunkSource, Summary, as_source, summarise
from ._init import INIT_METHODS, INIT_ROWS, seed_labels
from ._mixture import Mixture
from ._quantiles import TrainingQuantiles
from ._scoring import CHUNK_ROWS, LOG_2PI, UNDERFLOW
from ._validation import (
    FloatArray,
    check_non_negative,
    check_positive_int,
    check_structure,
)

#: Re-seeds of collapsing components allowed in one restart before it is abandoned.
MAX_RESEEDS = 10
#: Default floor on component variances, as a fraction of each feature's data variance.
VARIANCE_FLOOR = 1e-4


@dataclass(frozen=True)
class FitProgress:
    """Reported to the ``progress`` callback after every EM iteration (1-based counts)."""

    restart: int
    restarts: int
    iteration: int
    log_likelihood: float
    candidate: int = 1
    candidates: int = 1


@dataclass(frozen=True)
class RestartReport:
    """How one restart ended."""

    restart: int
    log_likelihood: float
    iterations: int
    converged: bool
    reseeds: int
    degenerate: bool


@dataclass(frozen=True)
class FitResult:
    """A fitted mixture and how it was found.

    ``log_likelihood`` is the (weighted) total over the training rows;
    ``bic = -2 log L + p ln n`` (Schwarz, 1978) and ``aic = -2 log L + 2 p`` with
    p = ``parameter_count`` and n the total weight (the row count when unweighted).
    ``trace`` holds the log-likelihood after each iteration of the kept restart.
    """

    mixture: Mixture
    log_likelihood: float
    iterations: int
    converged: bool
    bic: float
    aic: float
    parameter_count: int
    trace: tuple[float, ...]
    restart: int
    restarts: tuple[RestartReport, ...]
    reseeds: int
    degenerate: bool
    seed: int
    rows: int
    total_weight: float
    quantiles: TrainingQuantiles = field(repr=False)

    def report(self) -> dict[str, Any]:
        """The JSON-safe fit report (everything but the parameters and quantiles)."""
        return {
            "log_likelihood": self.log_likelihood,
            "iterations": self.iterations,
            "converged": self.converged,
            "bic": self.bic,
            "aic": self.aic,
            "parameter_count": self.parameter_count,
            "trace": list(self.trace),
            "restart": self.restart,
            "restarts": [vars(report) for report in self.restarts],
            "reseeds": self.reseeds,
            "degenerate": self.degenerate,
            "seed": self.seed,
            "rows": self.rows,
            "total_weight": self.total_weight,
        }


ProgressCallback = Callable[[FitProgress], object]


@dataclass(frozen=True)
class Options:
    """Checked fitting options shared by every restart and candidate."""

    restarts: int
    max_iterations: int
    tolerance: float
    ridge: float
    variance_floor: float
    init: str

    @classmethod
    def checked(cls, restarts: Any, max_iterations: Any, tolerance: Any, ridge: Any,
                variance_floor: Any, init: Any) -> Options:
        if init not in INIT_METHODS:
            raise ValueError(f"init must be one of {', '.join(INIT_METHODS)}; got {init!r}")
        return cls(
            restarts=check_positive_int(restarts, "restarts"),
            max_iterations=check_positive_int(max_iterations, "max_iterations"),
            tolerance=check_non_negative(tolerance, "tolerance"),
            ridge=check_non_negative(ridge, "ridge"),
            variance_floor=check_non_negative(variance_floor, "variance_floor"),
            init=str(init),
        )


def fit(
    X: Any,
    components: int = 3,
    structure: str = "full",
    restarts: int = 4,
    max_iterations: int = 300,
    tolerance: float = 1e-6,
    ridge: float = 1e-6,
    init: str = "kmeans++",
    seed: int | None = None,
    weights: Any = None,
    progress: ProgressCallback | None = None,
    variance_floor: float = VARIANCE_FLOOR,
) -> FitResult:
    """Fit a Gaussian mixture by EM, keeping the best of several restarts.

    Parameters
    ----------
    X : array_like (n, d) or re-iterable source of chunks
        Complete rows (no NaN). A source yields arrays of rows, or (rows, weights)
        pairs, and is read once per iteration, so it may be larger than memory.
    components : int
    structure : {"full", "diagonal", "spherical", "shared"}
    restarts : int
        Independent starts; the best non-degenerate one is kept.
    max_iterations : int
    tolerance : float
        Stop when the mean log-likelihood per point changes by less than this.
    ridge : float
        Added to every covariance diagonal in each M-step (in data units).
    init : {"kmeans++", "random"}
    seed : int, optional
        Makes the fit reproducible; drawn and recorded in the result when omitted.
    weights : array_like (n,), optional
        Non-negative frequency weights of the rows (arrays only).
    progress : callable, optional
        Called with a ``FitProgress`` after each iteration. To stop the fit, raise an
        exception from it: the exception propagates and no result is made.
    variance_floor : float
        Lowest component variance as a fraction of the feature's data variance.

    Returns
    -------
    FitResult

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> X = np.vstack([rng.normal(-5, 1, (200, 1)), rng.normal(5, 1, (200, 1))])
    >>> result = fit(X, components=2, seed=1)
    >>> np.sort(result.mixture.means.ravel()).round(0)
    array([-5.,  5.])
    """
    structure = check_structure(structure)
    options = Options.checked(restarts, max_iterations, tolerance, ridge, variance_floor, init)
    components = check_positive_int(components, "components")
    seed = _checked_seed(seed)
    source = as_source(X, weights)
    summary = summarise(source, np.random.default_rng(np.random.SeedSequence(seed)))
    return fit_prepared(source, summary, components, structure, options, seed, progress)


def _checked_seed(seed: Any) -> int:
    if seed is None:
        return int(np.random.SeedSequence().generate_state(1, np.uint64)[0] >> np.uint64(1))
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer or None; got {seed!r}")
    return int(seed)


def fit_prepared(
    source: ChunkSource, summary: Summary, components: int, structure: str, options: Options,
    seed: int, progress: ProgressCallback | None, candidate: int = 1, candidates: int = 1,
) -> FitResult:
    """Fit once the data has been checked and summarised (shared by ``select``)."""
    if summary.rows < components:
        raise ValueError(
            f"components ({components}) must not exceed the number of training rows "
            f"({summary.rows})"
        )
    problem = _Problem.build(source, summary, components, structure, options)
    restart_seeds = np.random.SeedSequence(seed).spawn(options.restarts + 1)[1:]
    outcomes = []
    for restart, restart_seed in enumerate(restart_seeds, start=1):

        def report(iteration: int, log_likelihood: float, restart: int = restart) -> None:
            if progress is not None:
                progress(FitProgress(restart, options.restarts, iteration, log_likelihood,
                                     candidate, candidates))

        outcomes.append(problem.run(restart, np.random.default_rng(restart_seed), report))
    return problem.result(_best(outcomes), outcomes, seed)


#: Restarts whose log-likelihoods agree to this relative tolerance count as equal.
TIE_TOLERANCE = 1e-9


def _best(outcomes: list[_Outcome]) -> _Outcome:
    """The best non-degenerate restart (degenerate only if all are); ties go to the first,
    so rounding differences (say, another chunking of the rows) cannot swap the winner."""
    eligible = [o for o in outcomes if not o.degenerate] or outcomes
    top = max(o.log_likelihood for o in eligible)
    return next(o for o in eligible
                if o.log_likelihood >= top - TIE_TOLERANCE * max(1.0, abs(top)))


@dataclass
class _State:
    weights: FloatArray
    means: FloatArray  # relative to the data mean
    covariance: Covariance


@dataclass
class _Outcome:
    restart: int
    state: _State
    trace: list[float]
    converged: bool
    reseeds: int
    degenerate: bool

    @property
    def log_likelihood(self) -> float:
        return self.trace[-1]


@dataclass
class _Problem:
    """The data, its scale and the options: what every restart shares."""

    source: ChunkSource
    summary: Summary
    components: int
    kind: type[Covariance]
    options: Options
    floor: FloatArray
    data_covariance: FloatArray

    @classmethod
    def build(cls, source: ChunkSource, summary: Summary, components: int, structure: str,
              options: Options) -> _Problem:
        variance = summary.variance
        if options.ridge == 0 and (variance == 0).any():
            feature = int(np.argmax(variance == 0))
            raise ValueError(
                f"feature {feature} is constant in the training data; drop it or set ridge > 0"
            )
        floor = np.where(variance > 0, options.variance_floor * variance, 0.0)
        floor = np.maximum(floor, options.ridge)
        floor = np.maximum(floor, np.finfo(float).tiny)
        centered = summary.sample - summary.mean
        w = summary.sample_weights
        scatter = (centered.T * w) @ centered / max(w.sum(), np.finfo(float).tiny)
        scatter[np.diag_indices_from(scatter)] += options.ridge
        scatter[np.diag_indices_from(scatter)] = np.maximum(np.diagonal(scatter), floor)
        return cls(source, summary, components, covariance_class(structure), options, floor,
                   scatter)

    # -- one restart -----------------------------------------------------------------

    def run(self, restart: int, rng: np.random.Generator,
            report: Callable[[int, float], None]) -> _Outcome:
        state = self._initial_state(rng)
        trace: list[float] = []
        reseeds = 0
        collapsing = False
        previous = -np.inf
        for iteration in range(1, self.options.max_iterations + 1):
            log_likelihood, statistics = self._expectation(state)
            trace.append(log_likelihood)
            report(iteration, log_likelihood)
            change = abs(log_likelihood - previous) / self.summary.total_weight
            converged = change < self.options.tolerance
            if converged or iteration == self.options.max_iterations:
                return _Outcome(restart, state, trace, converged, reseeds, collapsing)
            previous = log_likelihood
            state, collapsed = self._maximisation(*statistics)
            collapsing = bool(collapsed.any())
            if collapsing and reseeds < MAX_RESEEDS:
                reseeds += 1
                state = self._reseed(state, np.flatnonzero(collapsed), rng)
                collapsing = False
                previous = -np.inf  # the likelihood may drop after a re-seed
            # Past the re-seed budget EM goes on under the floor: a bounded, degenerate fit.
        raise AssertionError("unreachable: the last iteration returns")

    def _initial_state(self, rng: np.random.Generator) -> _State:
        sample = self.summary.sample
        weights = self.summary.sample_weights
        if sample.shape[0] > INIT_ROWS:
            chosen = np.sort(rng.choice(sample.shape[0], size=INIT_ROWS, replace=False))
            sample, weights = sample[chosen], weights[chosen]
        centered = sample - self.summary.mean
        scale = np.sqrt(np.where(self.summary.variance > 0, self.summary.variance, 1.0))
        labels, _ = seed_labels(centered / scale, weights, self.components,
                                self.options.init, rng)
        resp = np.zeros((self.components, sample.shape[0]))
        resp[labels, np.arange(sample.shape[0])] = weights
        counts = resp.sum(axis=1)
        sums = resp @ centered
        work = np.empty(self.components * sample.size)
        second = self.kind.second_moments(resp, np.ascontiguousarray(centered.T), work)
        if self.options.init == "random":
            state = _State(
                np.full(self.components, 1.0 / self.components),
                sums / np.maximum(counts, np.finfo(float).tiny)[:, None],
                self.kind.from_matrix(self.data_covariance, self.components),
            )
            collapsed = counts < self.kind.min_points(self.summary.mean.size)
        else:
            state, collapsed = self._maximisation(counts, sums, second)
        if collapsed.any():
            state = self._reseed(state, np.flatnonzero(collapsed), rng)
        return state

    def _expectation(
        self, state: _State
    ) -> tuple[float, tuple[FloatArray, FloatArray, FloatArray]]:
        """One pass: the log-likelihood of ``state`` and the sufficient statistics."""
        k, d = state.means.shape
        constants = _log_constants(state)
        shift = float(constants.max())
        # Rows arrive centred on the data mean, the frame the means are kept in.
        kernel = state.covariance.kernel(state.means, constants, np.zeros(d), shift)
        joint_buffer = np.empty(k * CHUNK_ROWS)
        work = np.empty(max(kernel.work_size(CHUNK_ROWS), k * d * CHUNK_ROWS))
        augmented_buffer = np.ones((d + 1) * CHUNK_ROWS)
        total = 0.0
        counts = np.zeros(k)
        sums = np.zeros((k, d))
        second: FloatArray | float = 0.0
        with np.errstate(divide="ignore", invalid="ignore", under="ignore"):
            for rows, weights in self.source:
                for start in range(0, rows.shape[0], CHUNK_ROWS):
                    block = rows[start : start + CHUNK_ROWS]
                    w = weights[start : start + CHUNK_ROWS]
                    m = block.shape[0]
                    augmented = augmented_buffer[: (d + 1) * m].reshape(d + 1, m)
                    augmented[d] = 1.0
                    centered = augmented[:d]
                    np.subtract(block.T, self.summary.mean[:, None], out=centered)
                    resp = joint_buffer[: k * m].reshape(k, m)
                    kernel.chunk(augmented, resp, work)
                    total += _responsibilities_in_place(kernel, resp, centered, w, shift)
                    counts += resp.sum(axis=1)
                    sums += resp @ centered.T
                    second = second + self.kind.second_moments(resp, centered, work)
        return total, (counts, sums, np.asarray(second))

    def _maximisation(
        self, counts: FloatArray, sums: FloatArray, second: FloatArray
    ) -> tuple[_State, np.ndarray]:
        d = sums.shape[1]
        safe = np.maximum(counts, np.finfo(float).tiny)
        means = sums / safe[:, None]
        covariance, clipped = self.kind.estimate(safe, means, second, self.options.ridge,
                                                 self.floor)
        collapsed = clipped | (counts < self.kind.min_points(d))
        return _State(counts / counts.sum(), means, covariance), collapsed

    def _reseed(self, state: _State, indices: np.ndarray, rng: np.random.Generator) -> _State:
        """Move collapsing components to random training rows with the data covariance."""
        sample = self.summary.sample
        p = self.summary.sample_weights / self.summary.sample_weights.sum()
        means = state.means.copy()
        means[indices] = sample[rng.choice(sample.shape[0], size=indices.size, p=p)]
        means[indices] -= self.summary.mean
        weights = state.weights.copy()
        weights[indices] = 1.0 / self.components
        wide = self.kind.from_matrix(self.data_covariance, self.components)
        return _State(weights / weights.sum(), means, state.covariance.replaced(indices, wide))

    # -- the result --------------------------------------------------------------------

    def result(self, best: _Outcome, outcomes: list[_Outcome], seed: int) -> FitResult:
        state = best.state
        mixture = Mixture._trusted(state.weights, state.means + self.summary.mean,
                                   state.covariance)
        log_likelihood = best.log_likelihood
        parameters = mixture.parameter_count
        n = self.summary.total_weight
        densities = mixture.log_density(self.summary.sample)
        return FitResult(
            mixture=mixture,
            log_likelihood=log_likelihood,
            iterations=len(best.trace),
            converged=best.converged,
            bic=-2.0 * log_likelihood + parameters * float(np.log(n)),
            aic=-2.0 * log_likelihood + 2.0 * parameters,
            parameter_count=parameters,
            trace=tuple(best.trace),
            restart=best.restart,
            restarts=tuple(
                RestartReport(o.restart, o.log_likelihood, len(o.trace), o.converged,
                              o.reseeds, o.degenerate)
                for o in outcomes
            ),
            reseeds=best.reseeds,
            degenerate=best.degenerate,
            seed=seed,
            rows=self.summary.rows,
            total_weight=n,
            quantiles=TrainingQuantiles.from_log_densities(densities,
                                                           self.summary.sample_weights),
        )


def _log_constants(state: _State) -> FloatArray:
    d = state.means.shape[1]
    with np.errstate(divide="ignore"):
        log_weights = np.log(state.weights)
    return log_weights - 0.5 * (d * LOG_2PI + state.covariance.log_det())


def _responsibilities_in_place(
    kernel: Any, joint: FloatArray, centered: FloatArray, weights: FloatArray, shift: float
) -> float:
    """Turn a chunk's shifted log-joint (k, c) into weighted responsibilities.

    Returns the chunk's weighted log-likelihood.
    """
    np.exp(joint, out=joint)
    total = joint.sum(axis=0)
    log_density = np.log(total) + shift
    joint *= weights / total
    low = np.flatnonzero(total < UNDERFLOW)
    if low.size:  # far from every component: redo those rows with a per-row maximum
        row_joint = kernel.rows(centered[:, low].T)
        row_density = np.logaddexp.reduce(row_joint, axis=1)
        joint[:, low] = (np.exp(row_joint - row_density[:, None]) * weights[low, None]).T
        log_density[low] = row_density
    return float(weights @ log_density)
