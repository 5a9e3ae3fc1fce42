"""Expectation-maximisation for Gaussian mixtures: the driver.

Restarts, the M-step, re-seeding and convergence live here; each iteration's pass
over the data is ``_estep.expected_statistics`` (block statistics that add), so the
same code fits an array or a source too large for memory. The restarts advance
together: one pass serves every restart still running, so a fit reads its source
once per iteration, not once per restart per iteration. EM runs in the standardised
frame of ``_frame`` (rows centred on the data mean, which keeps ``E[x x^T] - m m^T``
accurate for data far from the origin, and divided by each feature's standard
deviation), and the result is mapped back to data units once.
``_guard`` keeps components from collapsing without clipping thin but real
directions; a restart that ends with a component of too few effective rows (d + 1
for full, 2 for diagonal and spherical, 1 for shared) is degenerate, and the best
non-degenerate restart wins over any degenerate one.
"""

from __future__ import annotations

from collections.abc import Callable, Generator
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._covariance import Covariance, covariance_class
from ._data import Summary, as_source, summarise
from ._estep import DistributedData, Expectation, Statistics, expected_statistics
from ._frame import Frame
from ._guard import Floors, Guard, HeldComponent, checked_resolution
from ._init import INIT_METHODS, INIT_ROWS, seed_labels
from ._mixture import Mixture
from ._quantiles import TRAINING_SAMPLE_ROWS, TrainingQuantiles, TrainingSample
from ._validation import (
    FloatArray,
    check_non_negative,
    check_positive_int,
    check_structure,
)


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
    held: int = 0


@dataclass(frozen=True)
class FitResult:
    """A fitted mixture and how it was found.

    ``log_likelihood`` is the (weighted) total over the training rows;
    ``bic = -2 log L + p ln n`` (Schwarz, 1978) and ``aic = -2 log L + 2 p`` with
    p = ``parameter_count`` and n the total weight (the row count when unweighted).
    ``trace`` holds the log-likelihood after each iteration of the kept restart;
    ``held`` the components the degeneracy guard holds, with their held features.
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
    held: tuple[HeldComponent, ...] = ()
    #: A uniform sample of at most TRAINING_SAMPLE_ROWS training rows, for the tail
    #: fractions of rows with missing features.
    sample: TrainingSample | None = field(default=None, repr=False)

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
            "held": [{"component": h.component, "features": list(h.features), "rows": h.rows}
                     for h in self.held],
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
    init: str
    resolution: Any = None

    @classmethod
    def checked(cls, restarts: Any, max_iterations: Any, tolerance: Any, ridge: Any,
                init: Any, resolution: Any = None) -> Options:
        """The resolution is checked against the data's dimension once it is known."""
        if init not in INIT_METHODS:
            raise ValueError(f"init must be one of {', '.join(INIT_METHODS)}; got {init!r}")
        return cls(
            restarts=check_positive_int(restarts, "restarts"),
            max_iterations=check_positive_int(max_iterations, "max_iterations"),
            tolerance=check_non_negative(tolerance, "tolerance"),
            ridge=check_non_negative(ridge, "ridge"),
            init=str(init),
            resolution=resolution,
        )


def fit(
    X: Any,
    components: int = 3,
    structure: str = "full",
    restarts: int = 4,
    max_iterations: int = 300,
    tolerance: float = 1e-6,
    ridge: float = 1e-9,
    init: str = "kmeans++",
    seed: int | None = None,
    weights: Any = None,
    resolution: Any = None,
    progress: ProgressCallback | None = None,
) -> FitResult:
    """Fit a Gaussian mixture by EM, keeping the best of several restarts.

    Parameters
    ----------
    X : array_like (n, d), re-iterable source of chunks, or DistributedData
        Complete rows (no NaN). A source yields arrays of rows, or (rows, weights)
        pairs, and is read once per iteration, so it may be larger than memory;
        DistributedData runs each pass where its parts are.
    components : int
    structure : {"full", "diagonal", "spherical", "shared"}
    restarts : int
        Independent starts; the best non-degenerate one is kept.
    max_iterations : int
    tolerance : float
        Stop when the mean log-likelihood per point changes by less than this.
    ridge : float
        Added to every covariance diagonal in each M-step, as a fraction of each
        feature's variance (EM runs on standardised features; see ``_frame``).
    init : {"kmeans++", "random"}
    seed : int, optional
        Makes the fit reproducible; drawn and recorded in the result when omitted.
    weights : array_like (n,), optional
        Non-negative frequency weights of the rows (arrays only).
    resolution : array_like (d,), optional
        Each feature's smallest meaningful difference (its measurement resolution, in
        its units; 0 or None for none). No component's variance along that feature
        goes below resolution^2 / 12, the variance of rounding (see ``_guard``).
    progress : callable, optional
        Called with a ``FitProgress`` after each iteration. To stop the fit, raise an
        exception from it: the exception propagates and no result is made.

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
    options = Options.checked(restarts, max_iterations, tolerance, ridge, init, resolution)
    components = check_positive_int(components, "components")
    seed = _checked_seed(seed)
    summary, passes = prepared(X, weights, seed)
    return fit_prepared(passes, summary, components, structure, options, seed, progress)


def _checked_seed(seed: Any) -> int:
    if seed is None:
        return int(np.random.SeedSequence().generate_state(1, np.uint64)[0] >> np.uint64(1))
    if isinstance(seed, bool) or not isinstance(seed, int | np.integer) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer or None; got {seed!r}")
    return int(seed)


Passes = Callable[[list[Expectation]], list[Statistics]]


def prepared(X: Any, weights: Any, seed: int) -> tuple[Summary, Passes]:
    """The data's summary, and the function that runs one pass for several states."""
    if isinstance(X, DistributedData):
        if weights is not None:
            raise ValueError("weights go with an array, not with DistributedData")
        return X.summary(seed), X.statistics
    source = as_source(X, weights)
    return summarise(source, seed), lambda states: expected_statistics(states, source)


def fit_prepared(
    passes: Passes, summary: Summary, components: int, structure: str, options: Options,
    seed: int, progress: ProgressCallback | None, candidate: int = 1, candidates: int = 1,
) -> FitResult:
    """Fit once the data has been checked and summarised (shared by ``select``)."""
    if summary.rows < components:
        raise ValueError(
            f"components ({components}) must not exceed the number of training rows "
            f"({summary.rows})"
        )
    problem = _Problem.build(summary, components, structure, options)
    restart_seeds = np.random.SeedSequence(seed).spawn(options.restarts + 1)[1:]

    def report(restart: int, iteration: int, log_likelihood: float) -> None:
        if progress is not None:
            progress(FitProgress(restart, options.restarts, iteration,
                                 problem.in_data_units(log_likelihood), candidate,
                                 candidates))

    running = {restart: problem.steps(restart, np.random.default_rng(restart_seed), report)
               for restart, restart_seed in enumerate(restart_seeds, start=1)}
    waiting = {restart: next(steps) for restart, steps in running.items()}
    outcomes: dict[int, _Outcome] = {}
    while waiting:  # one pass over the data for every restart still running
        found = passes(list(waiting.values()))
        for restart, statistics in zip(list(waiting), found, strict=True):
            try:
                waiting[restart] = running[restart].send(statistics)
            except StopIteration as finished:
                outcomes[restart] = finished.value
                del waiting[restart]
    ordered = [outcomes[restart] for restart in sorted(outcomes)]
    return problem.result(_best(ordered), ordered, seed)


#: Restarts whose log-likelihoods agree to this relative tolerance count as equal.
TIE_TOLERANCE = 1e-9


def _best(outcomes: list[_Outcome]) -> _Outcome:
    """The best non-degenerate restart (degenerate only if all are); ties go to the first,
    so rounding differences (say, another chunking of the rows) cannot swap the winner."""
    finite = [o for o in outcomes if np.isfinite(o.log_likelihood)]
    if not finite:
        raise ValueError("no restart reached a finite log-likelihood; the data may hold "
                         "values too extreme to compare (try resolution or fewer components)")
    eligible = [o for o in finite if not o.degenerate] or finite
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
    held: tuple[HeldComponent, ...]

    @property
    def log_likelihood(self) -> float:
        return self.trace[-1]


@dataclass
class _Problem:
    """The data's summary, its standardised frame, the floors and the options: what
    every restart shares. Everything but ``summary`` is in the frame's units."""

    summary: Summary
    frame: Frame
    sample: FloatArray  # the summary's sample, standardised
    components: int
    kind: type[Covariance]
    options: Options
    floors: Floors
    data_covariance: FloatArray

    @classmethod
    def build(cls, summary: Summary, components: int, structure: str,
              options: Options) -> _Problem:
        resolution = checked_resolution(options.resolution, summary.mean.size)
        frame = Frame.of(summary, resolution, uniform=structure == "spherical")
        variance = (summary.scale / frame.scale) ** 2  # 1, but for spherical's one scale
        floors = Floors.build(variance, resolution / frame.scale, options.ridge)
        centered = frame.standardised(summary.sample)
        w = summary.sample_weights
        scatter = (centered.T * w) @ centered / max(w.sum(), np.finfo(float).tiny)
        scatter[np.diag_indices_from(scatter)] += options.ridge
        scatter[np.diag_indices_from(scatter)] = np.maximum(np.diagonal(scatter), floors.held)
        return cls(summary, frame, centered, components, covariance_class(structure),
                   options, floors, scatter)

    def in_data_units(self, log_likelihood: float) -> float:
        """A total log-likelihood of the frame, in data units."""
        return log_likelihood - self.summary.total_weight * self.frame.log_jacobian

    # -- one restart -----------------------------------------------------------------

    def steps(self, restart: int, rng: np.random.Generator,
              report: Callable[[int, int, float], None]
              ) -> Generator[Expectation, Statistics, _Outcome]:
        """One restart: yields the state whose statistics it needs next, is sent them,
        and returns its outcome."""
        guard = Guard(self.floors, self.components, self.kind.min_points(self.summary.mean.size))
        state = self._initial_state(guard, rng)
        trace: list[float] = []
        previous = -np.inf
        for iteration in range(1, self.options.max_iterations + 1):
            statistics = yield Expectation(state.weights, state.means, state.covariance,
                                           self.frame.center, self.frame.scale)
            trace.append(statistics.log_likelihood)
            report(restart, iteration, statistics.log_likelihood)
            change = abs(statistics.log_likelihood - previous) / self.summary.total_weight
            converged = change < self.options.tolerance
            if converged or iteration == self.options.max_iterations:
                counts = statistics.counts
                return _Outcome(restart, state, trace, converged, guard.reseeds,
                                guard.collapsed(counts), guard.report(counts))
            previous = statistics.log_likelihood
            state, changed = self._guarded_maximisation(guard, statistics.counts,
                                                        statistics.sums, statistics.second, rng)
            if changed:
                previous = -np.inf  # the likelihood may drop after a re-seed or a new hold
        raise AssertionError("unreachable: the last iteration returns")

    def _guarded_maximisation(
        self, guard: Guard, counts: FloatArray, sums: FloatArray, second: FloatArray,
        rng: np.random.Generator,
    ) -> tuple[_State, bool]:
        """The M-step under the guard's floors; re-seeds and new holds as it decides."""
        state, low = self._maximisation(counts, sums, second, guard.floor())
        reseed, newly_held = guard.review(counts, low)
        if newly_held:
            state, _ = self._maximisation(counts, sums, second, guard.floor())
        if reseed.size:
            state = self._reseed(state, reseed, rng)
        return state, bool(reseed.size) or newly_held

    def _initial_state(self, guard: Guard, rng: np.random.Generator) -> _State:
        centered = self.sample
        weights = self.summary.sample_weights
        if centered.shape[0] > INIT_ROWS:
            chosen = np.sort(rng.choice(centered.shape[0], size=INIT_ROWS, replace=False))
            centered, weights = centered[chosen], weights[chosen]
        labels, _ = seed_labels(centered, weights, self.components, self.options.init, rng)
        resp = np.zeros((self.components, centered.shape[0]))
        resp[labels, np.arange(centered.shape[0])] = weights
        counts = resp.sum(axis=1)
        sums = resp @ centered
        kind = self.kind
        work = np.empty(kind.work_size(self.components, centered.shape[1], centered.shape[0]))
        second = kind.second_moments(resp, np.ascontiguousarray(centered.T), work)
        if self.options.init == "random":
            state = _State(
                np.full(self.components, 1.0 / self.components),
                sums / np.maximum(counts, np.finfo(float).tiny)[:, None],
                kind.from_matrix(self.data_covariance, self.components),
            )
        else:
            state, low = self._maximisation(counts, sums, second, guard.floor())
            # A seed cluster whose rows share a value in some feature is held there at
            # once: that is the data's structure, not an unlucky start.
            if guard.hold(low):
                state, _ = self._maximisation(counts, sums, second, guard.floor())
        # A seed cluster too small to estimate starts from a random row instead.
        too_few = np.flatnonzero(counts < guard.min_points)
        if too_few.size:
            state = self._reseed(state, too_few, rng)
        return state

    def _maximisation(
        self, counts: FloatArray, sums: FloatArray, second: FloatArray, floor: FloatArray
    ) -> tuple[_State, np.ndarray]:
        safe = np.maximum(counts, np.finfo(float).tiny)
        means = sums / safe[:, None]
        covariance, low = self.kind.estimate(safe, means, second, self.options.ridge, floor)
        return _State(counts / counts.sum(), means, covariance), low

    def _reseed(self, state: _State, indices: np.ndarray, rng: np.random.Generator) -> _State:
        """Move collapsing components to random training rows with the data covariance."""
        sample = self.sample
        p = self.summary.sample_weights / self.summary.sample_weights.sum()
        means = state.means.copy()
        means[indices] = sample[rng.choice(sample.shape[0], size=indices.size, p=p)]
        weights = state.weights.copy()
        weights[indices] = 1.0 / self.components
        wide = self.kind.from_matrix(self.data_covariance, self.components)
        return _State(weights / weights.sum(), means, state.covariance.replaced(indices, wide))

    # -- the result --------------------------------------------------------------------

    def result(self, best: _Outcome, outcomes: list[_Outcome], seed: int) -> FitResult:
        state = best.state
        mixture = Mixture._trusted(state.weights, self.frame.means(state.means),
                                   self.frame.covariance(state.covariance))
        log_likelihood = self.in_data_units(best.log_likelihood)
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
            trace=tuple(self.in_data_units(value) for value in best.trace),
            restart=best.restart,
            restarts=tuple(
                RestartReport(o.restart, self.in_data_units(o.log_likelihood), len(o.trace),
                              o.converged, o.reseeds, o.degenerate, len(o.held))
                for o in outcomes
            ),
            reseeds=best.reseeds,
            degenerate=best.degenerate,
            seed=seed,
            rows=self.summary.rows,
            total_weight=n,
            quantiles=TrainingQuantiles.from_log_densities(densities,
                                                           self.summary.sample_weights),
            held=best.held,
            sample=self.training_sample(),
        )

    def training_sample(self) -> TrainingSample:
        """The reservoir rows of the smallest keys: a uniform sample, whatever the chunks."""
        summary = self.summary
        keep = np.sort(np.argsort(summary.sample_keys, kind="stable")[:TRAINING_SAMPLE_ROWS])
        return TrainingSample(summary.sample[keep], summary.sample_weights[keep])
