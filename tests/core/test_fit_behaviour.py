"""Fitting behaviour: monotone likelihood, chunked sources, weights, progress, guards,
and model selection by BIC (Schwarz, 1978) on well-separated invented mixtures."""

from __future__ import annotations

import tracemalloc
from collections.abc import Iterator

import numpy as np
import pytest

from core import STRUCTURES, FitProgress, Mixture, fit, select

from .datasets import iris


def separated(structure: str, k: int = 3, d: int = 2, n: int = 1500, seed: int = 0) -> tuple[
        Mixture, np.ndarray]:
    """A mixture with means 12 standard deviations apart, and a sample of it."""
    rng = np.random.default_rng(seed)
    means = np.eye(k, d) * 12.0 if k <= d else rng.standard_normal((k, d)) * 12.0
    covariances = {
        "full": np.stack([[[1.0, 0.3], [0.3, 0.5]]] * k) if d == 2 else np.stack([np.eye(d)] * k),
        "diagonal": np.full((k, d), 0.7),
        "spherical": np.full(k, 0.8),
        "shared": np.eye(d) * 0.9,
    }[structure]
    mixture = Mixture(np.full(k, 1 / k), means, covariances, structure)
    return mixture, mixture.sample(n, seed=seed)[0]


@pytest.mark.parametrize("structure", STRUCTURES)
def test_log_likelihood_never_decreases(structure: str) -> None:
    X, _ = iris()
    checked = 0
    for seed in range(6):
        result = fit(X, components=3, structure=structure, restarts=1, tolerance=1e-10,
                     seed=seed, init="random")
        if result.reseeds:
            continue  # a re-seed may lower the likelihood once, by design
        checked += 1
        steps = np.diff(result.trace)
        assert (steps >= -1e-9 * abs(result.log_likelihood)).all(), steps.min()
        assert result.iterations == len(result.trace)
        assert result.log_likelihood == result.trace[-1]
    assert checked >= 2


@pytest.mark.parametrize("structure", STRUCTURES)
def test_bic_and_aic_follow_their_formulas(structure: str) -> None:
    X, _ = iris()
    k, d, n = 3, 4, len(X)
    covariance_parameters = {"full": k * d * (d + 1) // 2, "diagonal": k * d,
                             "spherical": k, "shared": d * (d + 1) // 2}[structure]
    p = (k - 1) + k * d + covariance_parameters
    result = fit(X, components=k, structure=structure, seed=1)
    assert result.parameter_count == p
    # BIC = -2 log L + p ln n (Schwarz, 1978); AIC = -2 log L + 2 p (Akaike, 1974).
    assert result.bic == pytest.approx(-2 * result.log_likelihood + p * np.log(n), rel=1e-12)
    assert result.aic == pytest.approx(-2 * result.log_likelihood + 2 * p, rel=1e-12)


@pytest.mark.parametrize("structure", STRUCTURES)
def test_bic_picks_the_true_number_of_components(structure: str) -> None:
    _, X = separated(structure, k=3)
    selection = select(X, components=range(1, 7), structures=[structure], seed=5)
    assert selection.best.mixture.components == 3
    assert [c.components for c in selection.table] == [1, 2, 3, 4, 5, 6]
    bics = [c.bic for c in selection.table if not c.degenerate]
    assert selection.best.bic == min(bics)


def test_selection_over_structures_keeps_the_whole_table() -> None:
    _, X = separated("diagonal", k=2, n=800)
    seen: list[FitProgress] = []
    selection = select(X, components=[1, 2, 3], structures=["full", "spherical"],
                       criterion="aic", seed=2, restarts=2, progress=seen.append)
    assert [(c.components, c.structure) for c in selection.table] == [
        (1, "full"), (2, "full"), (3, "full"), (1, "spherical"), (2, "spherical"),
        (3, "spherical")]
    assert selection.criterion == "aic"
    assert selection.best.aic == min(c.aic for c in selection.table if not c.degenerate)
    assert {p.candidate for p in seen} == set(range(1, 7))
    assert all(p.candidates == 6 for p in seen)


def test_the_same_seed_gives_the_same_fit() -> None:
    _, X = separated("full", n=600)
    a = fit(X, components=3, seed=11)
    b = fit(X, components=3, seed=11)
    np.testing.assert_array_equal(a.mixture.means, b.mixture.means)
    assert a.trace == b.trace
    assert a.seed == 11
    assert fit(X, components=3).seed >= 0  # drawn and recorded when omitted


class RowChunks:
    """A re-iterable source that regenerates its rows on every pass, never holding
    more than one chunk: the shape of a dataset read from storage."""

    def __init__(self, mixture: Mixture, rows: int, chunk_rows: int) -> None:
        self.mixture, self.rows, self.chunk_rows = mixture, rows, chunk_rows

    def __iter__(self) -> Iterator[np.ndarray]:
        for i, start in enumerate(range(0, self.rows, self.chunk_rows)):
            size = min(self.chunk_rows, self.rows - start)
            yield self.mixture.sample(size, seed=i)[0]


def test_a_chunked_source_fits_like_the_array() -> None:
    mixture, _ = separated("full", n=10)
    source = RowChunks(mixture, rows=9_000, chunk_rows=700)
    X = np.vstack(list(source))
    from_array = fit(X, components=3, tolerance=1e-10, seed=4)
    from_chunks = fit(source, components=3, tolerance=1e-10, seed=4)
    assert from_chunks.log_likelihood == pytest.approx(from_array.log_likelihood, rel=1e-10)
    np.testing.assert_allclose(from_chunks.mixture.means, from_array.mixture.means, rtol=1e-7)
    uneven = [X[:5], X[5:4000], X[4000:]]
    from_list = fit(uneven, components=3, tolerance=1e-10, seed=4)
    np.testing.assert_allclose(from_list.mixture.means, from_array.mixture.means, rtol=1e-7)


def test_chunked_fitting_memory_does_not_grow_with_the_rows() -> None:
    mixture, _ = separated("full", n=10)

    def peak_mib(rows: int) -> float:
        tracemalloc.start()
        fit(RowChunks(mixture, rows=rows, chunk_rows=5_000), components=3, restarts=1,
            max_iterations=3, seed=1)
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        return peak / 2**20

    # Both sizes exceed the reservoir sample (65,536 rows), so only growth with n shows.
    small, large = peak_mib(300_000), peak_mib(1_200_000)
    assert large < small * 1.1, (small, large)


def test_a_one_shot_iterator_is_refused() -> None:
    with pytest.raises(ValueError, match="one-shot iterator"):
        fit(iter([np.zeros((10, 2))]), components=1)


def test_integer_weights_act_like_repeated_rows() -> None:
    _, X = separated("full", k=2, n=400)
    counts = np.random.default_rng(3).integers(1, 4, len(X))
    weighted = fit(X, weights=counts, components=2, tolerance=1e-12, seed=1)
    repeated = fit(np.repeat(X, counts, axis=0), components=2, tolerance=1e-12, seed=1)
    assert weighted.log_likelihood == pytest.approx(repeated.log_likelihood, rel=1e-9)
    order_w = np.argsort(weighted.mixture.means[:, 0])
    order_r = np.argsort(repeated.mixture.means[:, 0])
    np.testing.assert_allclose(weighted.mixture.means[order_w], repeated.mixture.means[order_r],
                               rtol=1e-7)
    assert weighted.total_weight == counts.sum()


def test_progress_reports_each_iteration_and_an_exception_stops_the_fit() -> None:
    X, _ = iris()
    seen: list[FitProgress] = []
    result = fit(X, components=2, restarts=2, seed=0, progress=seen.append)
    # The restarts advance together: each pass reports the next iteration of each.
    assert [p.restart for p in seen[:2]] == [1, 2]
    for restart in (1, 2):
        iterations = [p.iteration for p in seen if p.restart == restart]
        assert iterations == list(range(1, len(iterations) + 1))
    kept = [p.log_likelihood for p in seen if p.restart == result.restart]
    assert kept == list(result.trace)

    class Cancelled(Exception):
        pass

    calls = []

    def cancel(progress: FitProgress) -> None:
        calls.append(progress)
        raise Cancelled

    with pytest.raises(Cancelled):
        fit(X, components=2, progress=cancel)
    assert len(calls) == 1


def test_a_cluster_of_identical_rows_is_held_on_the_floor_and_named() -> None:
    rng = np.random.default_rng(0)
    X = np.vstack([rng.standard_normal((200, 2)), np.full((6, 2), 8.0)])
    result = fit(X, components=2, structure="diagonal", seed=1)
    atom = int(np.argmin(np.abs(result.mixture.means[:, 0] - 8.0)))
    assert [(h.component, h.features) for h in result.held] == [(atom, (0, 1))]
    assert result.held[0].rows == pytest.approx(6.0)
    assert not result.degenerate  # six rows, enough for a diagonal component
    assert all(r.reseeds <= 2 for r in result.restarts)  # at most once per component
    # Held at 1e-4 of each feature's variance, plus the ridge (the guard's documented floor;
    # the default ridge is 1e-9 of each feature's variance).
    np.testing.assert_allclose(result.mixture.covariances[atom],
                               (1e-4 + 1e-9) * X.var(axis=0), rtol=1e-9)
    assert np.isfinite(result.log_likelihood)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"components": 0}, "components must be an integer >= 1; got 0"),
        ({"structure": "round"}, "structure must be one of full, diagonal, spherical, shared; "
                                 "got 'round'"),
        ({"init": "guess"}, "init must be one of kmeans++, random; got 'guess'"),
        ({"tolerance": -1.0}, "tolerance must be a non-negative number; got -1.0"),
        ({"restarts": 0}, "restarts must be an integer >= 1; got 0"),
        ({"seed": -3}, "seed must be a non-negative integer or None; got -3"),
        ({"components": 20}, "components (20) must not exceed the number of training rows (10)"),
    ],
)
def test_bad_fit_arguments_are_named(kwargs: dict[str, object], message: str) -> None:
    X = np.random.default_rng(0).standard_normal((10, 2))
    with pytest.raises(ValueError) as caught:
        fit(X, **kwargs)  # type: ignore[arg-type]
    assert str(caught.value) == message


def test_training_rows_with_missing_values_are_refused() -> None:
    X = np.zeros((10, 2))
    X[6, 1] = np.nan
    with pytest.raises(ValueError, match=r"^training row 6 has a missing or non-finite value in "
                                         r"column 1; fitting needs complete rows"):
        fit(X, components=1)


def test_a_constant_feature_is_refused_unless_it_has_a_resolution() -> None:
    X = np.column_stack([np.random.default_rng(0).standard_normal(50), np.ones(50)])
    for ridge in (0.0, 1e-3):
        with pytest.raises(ValueError) as caught:
            fit(X, components=1, ridge=ridge)
        assert str(caught.value) == ("feature 1 has no spread in the training data (every "
                                     "row has 1.0); drop it, or give its resolution")
    # Its resolution is the spread it is read with: the component sits at r^2 / 12.
    result = fit(X, components=2, seed=0, resolution=[0, 0.01])
    assert np.isfinite(result.log_likelihood)
    np.testing.assert_allclose(result.mixture.covariances[:, 1, 1], 0.01**2 / 12 * (1 + 1e-9))


def test_the_restarts_share_one_read_of_the_source_per_iteration() -> None:
    """A source larger than memory is read once for the summary, then once per
    iteration however many restarts run, and the fit is the one an array gives."""
    X, _ = iris()

    class Counted:
        passes = 0

        def __iter__(self) -> Iterator[np.ndarray]:
            Counted.passes += 1  # counted once the pass starts reading
            yield X[:60]
            yield X[60:]

    streamed = fit(Counted(), components=2, restarts=3, max_iterations=5, tolerance=0.0,
                   seed=1)
    assert Counted.passes == 1 + 5  # not 1 + 3 x 5
    direct = fit(X, components=2, restarts=3, max_iterations=5, tolerance=0.0, seed=1)
    np.testing.assert_allclose(streamed.mixture.means, direct.mixture.means, rtol=1e-12)
