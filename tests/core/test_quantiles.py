"""Training quantiles and tail fractions, checked against empirical ranks and, for fresh
draws from the fitted model, against the uniform law (scipy.stats.kstest)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from core import Mixture, TailFractions, TrainingQuantiles, TrainingSample, fit


def test_tail_fraction_matches_the_empirical_rank() -> None:
    values = np.random.default_rng(0).gumbel(size=20_000)
    table = TrainingQuantiles.from_log_densities(values)
    assert table.values.size == 1001
    probe = np.linspace(values.min(), values.max(), 500)
    empirical = (values[None, :] < probe[:, None]).mean(axis=1)
    np.testing.assert_allclose(table.tail_fraction(probe), empirical, atol=2e-3)
    assert table.mean == pytest.approx(values.mean())


def test_tail_fraction_is_zero_below_and_one_above_the_table() -> None:
    table = TrainingQuantiles.from_log_densities([1.0, 2.0, 3.0, 4.0])
    np.testing.assert_array_equal(table.tail_fraction([0.0, 5.0, -np.inf]), [0.0, 1.0, 0.0])
    assert (np.diff(table.tail_fraction(np.linspace(0, 5, 200))) >= 0).all()


def test_weights_count_like_repeated_values() -> None:
    values = np.array([-3.0, -1.0, -2.0, -5.0])
    weights = np.array([1, 3, 2, 1])
    weighted = TrainingQuantiles.from_log_densities(values, weights)
    repeated = TrainingQuantiles.from_log_densities(np.repeat(values, weights))
    np.testing.assert_allclose(weighted.values, repeated.values)


def test_ties_do_not_break_the_table() -> None:
    table = TrainingQuantiles.from_log_densities([1.0] * 50 + [2.0] * 50, size=11)
    fractions = table.tail_fraction([0.5, 1.0, 1.5, 2.0, 2.5])
    assert (np.diff(fractions) >= 0).all()
    assert fractions[0] == 0.0
    assert fractions[-1] == 1.0


def test_fresh_points_from_the_model_have_uniform_tail_fractions() -> None:
    """The probability integral transform: if new points come from the fitted law,
    their tail fractions are uniform on [0, 1]."""
    truth = Mixture([0.4, 0.6], [[0.0, 0.0], [4.0, 1.0]],
                    [[[1.0, 0.5], [0.5, 1.0]], [[0.6, 0.0], [0.0, 2.0]]])
    training, _ = truth.sample(20_000, seed=1)
    result = fit(training, components=2, seed=2)
    fresh, _ = truth.sample(3_000, seed=3)
    fractions = result.quantiles.tail_fraction(result.mixture.log_density(fresh))
    assert stats.kstest(fractions, "uniform").pvalue > 0.01


def test_round_trip_and_checks() -> None:
    table = TrainingQuantiles.from_log_densities(np.arange(10.0), size=5)
    again = TrainingQuantiles.from_dict(table.to_dict())
    np.testing.assert_array_equal(again.values, table.values)
    assert again.mean == table.mean
    with pytest.raises(ValueError, match="non-decreasing"):
        TrainingQuantiles.from_dict({"values": [3.0, 1.0], "mean": 0.0})
    with pytest.raises(ValueError, match="finite"):
        TrainingQuantiles.from_log_densities([1.0, np.nan])


def test_tail_fractions_of_incomplete_rows_are_uniform_for_rows_like_the_training() -> None:
    """Rows from the generating mixture with random dropouts: their tail fractions,
    against the training sample's marginal quantiles per pattern, pass
    scipy.stats.kstest against the uniform law; the same rows shifted fail it."""
    rng = np.random.default_rng(41)
    truth = Mixture([0.5, 0.3, 0.2], [[0.0, 0.0, 0.0, 0.0], [5.0, 1.0, -2.0, 3.0],
                                      [-3.0, 4.0, 2.0, -1.0]],
                    [np.eye(4) + 0.5, np.diag([1.0, 2.0, 0.5, 1.5]), np.eye(4) * 2.0])
    training, _ = truth.sample(40_000, seed=42)
    result = fit(training, components=3, structure="full", seed=43, restarts=2)
    assert result.sample is not None and result.sample.rows.shape == (20_000, 4)
    tails = TailFractions(result.mixture, result.quantiles, result.sample)
    fresh, _ = truth.sample(4_000, seed=44)
    dropped = rng.random(fresh.shape) < 0.3
    dropped[dropped.all(axis=1), 0] = False  # every row keeps a feature
    incomplete = dropped.any(axis=1)
    fresh[dropped] = np.nan
    found = tails(fresh, result.mixture.log_density(fresh))
    assert not np.isnan(found).any()
    assert stats.kstest(found[incomplete], "uniform").pvalue > 0.001
    assert stats.kstest(found[~incomplete], "uniform").pvalue > 0.001
    shifted = fresh + 1.5
    moved = tails(shifted, result.mixture.log_density(shifted))
    assert stats.kstest(moved[incomplete], "uniform").pvalue < 0.001


def test_without_a_training_sample_incomplete_rows_have_no_tail_fraction() -> None:
    mixture = Mixture([1.0], [[0.0, 0.0]], [1.0], "spherical")
    quantiles = TrainingQuantiles.from_log_densities(mixture.log_density(
        mixture.sample(500, seed=1)[0]))
    X = np.array([[0.0, 0.0], [np.nan, 0.0]])
    found = TailFractions(mixture, quantiles, None)(X, mixture.log_density(X))
    assert found[0] > 0.5 and np.isnan(found[1])


def test_the_training_sample_does_not_depend_on_chunking() -> None:
    """A uniform sample by reservoir keys drawn in row order: the same rows whether the
    training data arrive in one array or in chunks (core.fit accepts an iterable)."""
    X, _ = Mixture([0.5, 0.5], [[0.0], [4.0]], [1.0, 1.0], "spherical").sample(30_000, seed=5)
    whole = fit(X, components=2, structure="spherical", seed=6, restarts=1)
    chunked = fit([X[:7_000], X[7_000:21_000], X[21_000:]], components=2,
                  structure="spherical", seed=6, restarts=1)
    assert whole.sample is not None and chunked.sample is not None
    np.testing.assert_array_equal(whole.sample.rows, chunked.sample.rows)


def test_a_few_points_get_the_tail_fractions_of_a_batch() -> None:
    """Up to FEW_POINTS values take a bisection in Python; it must agree with the array
    path on every kind of value: inside, on knots, in flat runs, beyond both ends."""
    rng = np.random.default_rng(12)
    for table in (TrainingQuantiles.from_log_densities(rng.gumbel(size=5_000)),
                  TrainingQuantiles.from_log_densities([1.0] * 50 + [2.0] * 50, size=11)):
        probe = np.concatenate([
            np.linspace(table.values[0] - 1, table.values[-1] + 1, 2_000), table.values,
            [-np.inf, np.inf, np.nan]])
        batch = table.tail_fraction(probe)
        one_by_one = np.array([table.tail_fraction(probe[i : i + 1])[0]
                               for i in range(probe.size)])
        np.testing.assert_allclose(one_by_one, batch, rtol=0, atol=1e-15)


def full_sample_fraction(mixture: Mixture, sample: TrainingSample, x: np.ndarray,
                         log_density: float) -> float:
    """The reference: the weighted fraction of every sample row whose marginal
    log-density, on the features x observes, is below x's."""
    observed = np.flatnonzero(~np.isnan(x))
    values = mixture.marginal(observed).log_density(sample.rows[:, observed])
    return float(sample.weights[values < log_density].sum() / sample.weights.sum())


def test_tails_of_distinct_patterns_are_exact_when_small_and_within_the_band_else() -> None:
    """600 in-distribution rows, each of its own missing pattern: where the full-sample
    fraction is below 0.05 the answer is it; elsewhere within the pilot's band, the
    Dvoretzky-Kiefer-Wolfowitz bound with Massart's constant at risk 1e-3; and the
    answers are uniform (scipy.stats.kstest)."""
    rng = np.random.default_rng(51)
    truth = Mixture([0.4, 0.35, 0.25], rng.normal(0, 3, (3, 9)),
                    np.stack([np.eye(9) + 0.4 * np.outer(v, v) for v in rng.normal(size=(3, 9))]))
    training, _ = truth.sample(40_000, seed=52)
    result = fit(training, components=3, seed=53, restarts=1)
    assert result.sample is not None
    tails = TailFractions(result.mixture, result.quantiles, result.sample)
    assert tails.pilot_band == pytest.approx(np.sqrt(np.log(2e3) / 2e3), rel=1e-9)
    X, _ = truth.sample(600, seed=54)
    codes = rng.choice(2**9 - 2, 500, replace=False) + 1
    X[:500][((codes[:, None] >> np.arange(9)) & 1).astype(bool)] = np.nan
    X[500:, 3] = np.nan  # a hundred rows of one pattern
    log_density = result.mixture.log_density(X)
    found = tails(X, log_density)
    expected = np.array([full_sample_fraction(result.mixture, result.sample, x, v)
                         for x, v in zip(X, log_density, strict=True)])
    small = expected < 0.05
    assert small.sum() > 10
    np.testing.assert_array_equal(found[small], expected[small])
    assert np.abs(found - expected)[~small].max() <= tails.pilot_band
    assert stats.kstest(found, "uniform").pvalue > 0.001
    # Patterns taken a few at a time, to bound memory, give the same answers (to the
    # rounding of the weighted sums).
    from core import _quantiles

    _quantiles.AT_ONCE, at_once = 7, _quantiles.AT_ONCE
    try:
        np.testing.assert_allclose(tails(X, log_density), found, rtol=1e-12)
    finally:
        _quantiles.AT_ONCE = at_once
