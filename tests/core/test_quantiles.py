"""Training quantiles and tail fractions, checked against empirical ranks and, for fresh
draws from the fitted model, against the uniform law (scipy.stats.kstest)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from core import Mixture, TrainingQuantiles, fit


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
