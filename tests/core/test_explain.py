"""Mixture.explain against scipy: per row and feature, the weights of the components
given the other observed features by scipy.stats.multivariate_normal on sub-matrices,
the Gaussian conditioning formulas solved by numpy, and the mixture's CDF from
scipy.stats.norm (cdf and sf)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from core import Mixture
from core._scoring import PARALLEL_MIN_ROWS

from .helpers import full_matrices, random_mixture


def reference(mixture: Mixture, row: np.ndarray, j: int) -> tuple[float, float, float, float]:
    """(log-density, two-sided tail, mean, sd) of x_j given the row's other observed
    features, computed from scratch."""
    covariances = full_matrices(mixture)
    others = [i for i in range(len(row)) if i != j and not np.isnan(row[i])]
    log_weights, means, variances = [], [], []
    for w, mu, sigma in zip(mixture.weights, mixture.means, covariances, strict=True):
        if others:
            so = sigma[np.ix_(others, others)]
            log_weights.append(np.log(w) + stats.multivariate_normal(mu[others], so).logpdf(
                row[others]))
            gain = np.linalg.solve(so, sigma[others, j])
            means.append(mu[j] + gain @ (row[others] - mu[others]))
            variances.append(sigma[j, j] - gain @ sigma[others, j])
        else:
            log_weights.append(np.log(w))
            means.append(mu[j])
            variances.append(sigma[j, j])
    log_shares = np.array(log_weights) - np.logaddexp.reduce(log_weights)
    weights = np.exp(log_shares)
    m, sd = np.array(means), np.sqrt(variances)
    log_density = float(np.logaddexp.reduce(log_shares + stats.norm(m, sd).logpdf(row[j])))
    below = float(weights @ stats.norm(m, sd).cdf(row[j]))
    above = float(weights @ stats.norm(m, sd).sf(row[j]))
    mean = float(weights @ m)
    spread = float(np.sqrt(weights @ (sd**2 + (m - mean) ** 2)))  # total variance, centred
    return log_density, min(2 * min(below, above), 1.0), mean, spread


@pytest.mark.parametrize("structure", ["full", "diagonal", "spherical", "shared"])
def test_explanations_match_scipy(structure: str) -> None:
    rng = np.random.default_rng(21)
    mixture = random_mixture(rng, structure, 3, 4)
    X, _ = mixture.sample(40, seed=22)
    X[::3] += rng.normal(0, 4, (len(X[::3]), 4))  # some unusual rows
    X[1, 2] = np.nan  # one missing feature
    X[4, [0, 3]] = np.nan  # two
    X[7, [0, 1, 2]] = np.nan  # all but one: conditions on nothing
    found = mixture.explain(X)
    for i, row in enumerate(X):
        for j in range(4):
            if np.isnan(row[j]):
                assert np.isnan(found.conditional_log_density[i, j])
                assert np.isnan(found.conditional_tail[i, j])
                continue
            expected = reference(mixture, row, j)
            got = (found.conditional_log_density[i, j], found.conditional_tail[i, j],
                   found.conditional_mean[i, j], found.conditional_sd[i, j])
            np.testing.assert_allclose(got, expected, rtol=1e-9, atol=1e-300,
                                       err_msg=f"row {i}, feature {j}")
        assert found.most_unusual[i] == np.nanargmin(found.conditional_tail[i])


def test_a_model_of_one_feature_conditions_on_nothing() -> None:
    """Its explanation is the mixture itself: log-density and tail of the marginal."""
    mixture = Mixture([0.3, 0.7], [[0.0], [5.0]], [[[1.0]], [[4.0]]])
    x = np.array([[1.5], [12.0]])
    found = mixture.explain(x)
    np.testing.assert_allclose(found.conditional_log_density[:, 0], mixture.log_density(x),
                               rtol=1e-12)
    cdf = 0.3 * stats.norm(0, 1).cdf(x[:, 0]) + 0.7 * stats.norm(5, 2).cdf(x[:, 0])
    np.testing.assert_allclose(found.conditional_tail[:, 0], 2 * np.minimum(cdf, 1 - cdf),
                               rtol=1e-9)
    np.testing.assert_allclose(found.conditional_mean[:, 0], 0.3 * 0 + 0.7 * 5, rtol=1e-12)
    assert found.most_unusual.tolist() == [0, 0]


def test_the_sensor_that_broke_the_pattern_is_named() -> None:
    """Two sensors that move together: a row where only the second departs names it."""
    mixture = Mixture([1.0], [[0.0, 0.0, 0.0]],
                      [[[1.0, 0.95, 0.0], [0.95, 1.0, 0.0], [0.0, 0.0, 1.0]]])
    found = mixture.explain([[1.0, -1.0, 0.2], [1.0, 1.0, 3.5]])
    assert found.conditional_tail[0, 2] > 0.5 and found.conditional_tail[0, 0] < 1e-6
    assert found.most_unusual[1] == 2


def test_rows_with_no_observed_feature_are_refused() -> None:
    mixture = Mixture([1.0], [[0.0, 0.0]], [1.0], "spherical")
    with pytest.raises(ValueError, match=r"X\[1\] has no observed feature"):
        mixture.explain([[0.0, 1.0], [np.nan, np.nan]])


def test_a_component_of_negligible_weight_can_carry_the_tail() -> None:
    """x fits the first component except in feature 2, 30 sd out; the second component
    has weight e^-60 given the other features but sits on x_2: the tail is its share,
    not the first component's 1e-197."""
    mixture = Mixture([0.5, 0.5], [[0.0, 0.0, 0.0], [np.sqrt(60.0), np.sqrt(60.0), 30.0]],
                      [1.0, 1.0], "spherical")
    row = np.array([0.0, 0.0, 30.0])
    found = mixture.explain(row[None])
    expected = reference(mixture, row, 2)
    assert 1e-30 < expected[1] < 1e-20
    np.testing.assert_allclose(
        (found.conditional_log_density[0, 2], found.conditional_tail[0, 2],
         found.conditional_mean[0, 2], found.conditional_sd[0, 2]), expected, rtol=1e-9)


@pytest.mark.parametrize("spread", [40.0, 1.0])
def test_batches_of_many_chunks_match_scipy(spread: float) -> None:
    """Rows explained in several chunks, on both threads (more rows than
    PARALLEL_MIN_ROWS): components far apart (one alone on most rows) or overlapping
    (several live on most), with some unusual rows."""
    rng = np.random.default_rng(23)
    mixture = random_mixture(rng, "full", 4, 5, spread=spread)
    rows = PARALLEL_MIN_ROWS + 800
    X, _ = mixture.sample(rows, seed=24)
    X[::7] += rng.normal(0, 5, (len(X[::7]), 5))
    found = mixture.explain(X)
    for i, j in zip(rng.integers(0, rows, 80), rng.integers(0, 5, 80), strict=True):
        got = (found.conditional_log_density[i, j], found.conditional_tail[i, j],
               found.conditional_mean[i, j], found.conditional_sd[i, j])
        np.testing.assert_allclose(got, reference(mixture, X[i], j), rtol=1e-9, atol=1e-300,
                                   err_msg=f"row {i}, feature {j}")
    np.testing.assert_array_equal(found.most_unusual, np.argmin(found.conditional_tail, axis=1))
    # The same rows on the calling thread alone give the same answers, bit for bit.
    alone = mixture.explain(X[:3_000])
    np.testing.assert_array_equal(alone.conditional_tail, found.conditional_tail[:3_000])
    np.testing.assert_array_equal(alone.conditional_log_density,
                                  found.conditional_log_density[:3_000])


def test_a_component_far_more_concentrated_than_another_keeps_exact_log_densities() -> None:
    """Precisions 1e9 times the other component's: the bound on lone rows can no
    longer promise that the other joints are negligible in log p(x), so every row
    sums them (checked against scipy like the rest)."""
    from core._explain import _Factors

    mixture = Mixture([0.5, 0.5], [[1.0, 2.0, 3.0], [1.5, 2.0, 3.0]], [1.0, 1e-9],
                      "spherical")
    factors = _Factors(mixture.weights, mixture.means, mixture._precisions(),
                       mixture._covariance.log_det())
    assert not factors.lone_joint_is_best  # the case this test is about
    rng = np.random.default_rng(25)
    X = np.vstack([rng.normal([1.0, 2.0, 3.0], 1.0, (30, 3)),
                   [[1.5, 2.0, 3.00001], [1.5, 2.0001, 3.0]]])  # by the small one
    found = mixture.explain(X)
    for i, row in enumerate(X):
        for j in range(3):
            got = (found.conditional_log_density[i, j], found.conditional_tail[i, j],
                   found.conditional_mean[i, j], found.conditional_sd[i, j])
            np.testing.assert_allclose(got, reference(mixture, row, j), rtol=1e-9,
                                       atol=1e-300, err_msg=f"row {i}, feature {j}")
