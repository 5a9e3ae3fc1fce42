"""Sampling checked with scipy.stats: a KS test against the mixture CDF in 1-D, a
chi-square test of component shares, and moments of each component's draws."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from core import STRUCTURES, Mixture

from .helpers import full_matrices, random_mixture


def test_one_dimensional_draws_follow_the_mixture_cdf() -> None:
    weights = np.array([0.2, 0.5, 0.3])
    means = np.array([[-4.0], [0.0], [5.0]])
    sds = np.array([0.5, 1.5, 1.0])
    mixture = Mixture(weights, means, sds**2, "spherical")
    points, _ = mixture.sample(20_000, seed=3)

    def cdf(x: np.ndarray) -> np.ndarray:
        return sum(w * stats.norm(m, s).cdf(x) for w, m, s in zip(weights, means[:, 0], sds,
                                                                   strict=True))

    assert stats.kstest(points[:, 0], cdf).pvalue > 0.01


@pytest.mark.parametrize("structure", STRUCTURES)
def test_component_shares_and_moments(structure: str) -> None:
    rng = np.random.default_rng(4)
    mixture = random_mixture(rng, structure, 4, 3)
    n = 40_000
    points, components = mixture.sample(n, seed=5)
    counts = np.bincount(components, minlength=4)
    assert stats.chisquare(counts, mixture.weights * n).pvalue > 0.001
    for j, cov in enumerate(full_matrices(mixture)):
        own = points[components == j]
        # Standard errors of a mean and a covariance entry: a few sigma / sqrt(n_j).
        tolerance = 6.0 * np.sqrt(np.max(np.diag(cov)) / len(own))
        np.testing.assert_allclose(own.mean(axis=0), mixture.means[j], atol=tolerance)
        np.testing.assert_allclose(np.cov(own.T), cov, atol=8.0 * np.max(np.diag(cov))
                                   / np.sqrt(len(own)))


def test_the_same_seed_gives_the_same_draw() -> None:
    mixture = random_mixture(np.random.default_rng(6), "full", 3, 2)
    a_points, a_components = mixture.sample(100, seed=42)
    b_points, b_components = mixture.sample(100, seed=42)
    np.testing.assert_array_equal(a_points, b_points)
    np.testing.assert_array_equal(a_components, b_components)
    assert not np.array_equal(a_points, mixture.sample(100, seed=43)[0])


@pytest.mark.parametrize("structure", STRUCTURES)
def test_a_large_draw_is_the_one_a_single_block_would_give(structure: str) -> None:
    """Drawn in blocks to bound memory, yet the same numbers as drawing every row at
    once: components by the weights, then standard normals scaled by numpy's own
    Cholesky factor of each component's covariance."""
    mixture = random_mixture(np.random.default_rng(8), structure, 3, 5)
    n = 10_000  # more than two blocks
    points, components = mixture.sample(n, seed=9)
    rng = np.random.default_rng(9)
    expected_components = rng.choice(3, size=n, p=mixture.weights)
    noise = rng.standard_normal((n, 5))
    factors = np.linalg.cholesky(full_matrices(mixture))
    expected = mixture.means[expected_components] + np.einsum(
        "nab,nb->na", factors[expected_components], noise)
    np.testing.assert_array_equal(components, expected_components)
    np.testing.assert_allclose(points, expected, rtol=1e-12, atol=1e-12)


def test_zero_draws_and_bad_counts() -> None:
    mixture = Mixture([1.0], [[0.0, 1.0]], [1.0], "spherical")
    points, components = mixture.sample(0, seed=1)
    assert points.shape == (0, 2)
    assert components.shape == (0,)
    with pytest.raises(ValueError, match=r"^n must be a non-negative integer; got -1$"):
        mixture.sample(-1)
