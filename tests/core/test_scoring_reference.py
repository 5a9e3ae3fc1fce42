"""Scoring checked against scipy.stats.multivariate_normal and scipy.special.logsumexp."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import logsumexp
from scipy.stats import multivariate_normal

from core import STRUCTURES, Mixture, fit

from .helpers import full_matrices, random_mixture

# (k, d) pairs spanning 1 <= d <= 20 and 1 <= k <= 10, with both extremes.
SHAPES = [(1, 1), (10, 1), (1, 20), (10, 20), (3, 2), (8, 16), (5, 7), (2, 13)]
# Row counts that take the single-point path, the chunked path, and the threaded path.
ROWS = [1, 5, 3000, 20_000]


def scipy_log_joint(mixture: Mixture, X: np.ndarray) -> np.ndarray:
    """log w_j + log N(x | mu_j, S_j) by scipy.stats.multivariate_normal, shape (n, k)."""
    matrices = full_matrices(mixture)
    return np.stack(
        [
            np.log(w) + multivariate_normal(mean, cov).logpdf(X).reshape(-1)
            for w, mean, cov in zip(mixture.weights, mixture.means, matrices, strict=True)
        ],
        axis=1,
    )


@pytest.mark.parametrize("structure", STRUCTURES)
@pytest.mark.parametrize(("k", "d"), SHAPES)
def test_log_density_and_responsibilities_match_scipy(structure: str, k: int, d: int) -> None:
    rng = np.random.default_rng(k * 100 + d)
    mixture = random_mixture(rng, structure, k, d)
    X = rng.standard_normal((max(ROWS), d)) * 4.0
    for n in ROWS:
        joint = scipy_log_joint(mixture, X[:n])
        expected = logsumexp(joint, axis=1)
        np.testing.assert_allclose(mixture.log_density(X[:n]), expected, rtol=1e-9)
        expected_resp = np.exp(joint - expected[:, None])
        resp = mixture.responsibilities(X[:n])
        np.testing.assert_allclose(resp, expected_resp, rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(resp.sum(axis=1), 1.0, rtol=1e-12)
        np.testing.assert_array_equal(mixture.labels(X[:n]), np.argmax(expected_resp, axis=1))


@pytest.mark.parametrize("structure", STRUCTURES)
def test_data_far_from_the_origin_keeps_its_digits(structure: str) -> None:
    """Centring keeps expanded quadratic forms exact when |x| >> spread (scipy reference)."""
    rng = np.random.default_rng(7)
    base = random_mixture(rng, structure, 4, 6)
    mixture = Mixture(base.weights, base.means + 1e4, base.covariances, structure)
    X = rng.standard_normal((5000, 6)) * 3.0 + 1e4
    expected = logsumexp(scipy_log_joint(mixture, X), axis=1)
    np.testing.assert_allclose(mixture.log_density(X), expected, rtol=1e-9)


@pytest.mark.parametrize("structure", STRUCTURES)
def test_points_far_from_every_component_stay_finite(structure: str) -> None:
    """Rows whose exponentials underflow are recomputed row by row (scipy reference)."""
    rng = np.random.default_rng(8)
    mixture = random_mixture(rng, structure, 3, 4)
    X = rng.standard_normal((600, 4))
    X[::50] *= 1e3  # log-densities around -1e5: exp underflows to zero
    joint = scipy_log_joint(mixture, X)
    expected = logsumexp(joint, axis=1)
    np.testing.assert_allclose(mixture.log_density(X), expected, rtol=1e-9)
    np.testing.assert_allclose(
        mixture.responsibilities(X), np.exp(joint - expected[:, None]), rtol=1e-9, atol=1e-12
    )


def test_a_zero_weight_component_never_explains_a_point() -> None:
    mixture = Mixture([0.0, 1.0], [[0.0], [5.0]], [1.0, 1.0], "spherical")
    X = np.array([[0.0], [5.0]] * 20)
    np.testing.assert_allclose(mixture.responsibilities(X)[:, 0], 0.0)
    expected = multivariate_normal(5.0, 1.0).logpdf(X[:, 0])
    np.testing.assert_allclose(mixture.log_density(X), expected, rtol=1e-12)


def test_float32_and_list_input_score_like_float64() -> None:
    rng = np.random.default_rng(9)
    mixture = random_mixture(rng, "full", 3, 5)
    X = rng.standard_normal((40, 5)).astype(np.float32)
    expected = mixture.log_density(X.astype(np.float64))
    np.testing.assert_array_equal(mixture.log_density(X), expected)
    np.testing.assert_array_equal(mixture.log_density(X.tolist()), expected)


def test_unusual_rows_of_a_fitted_model_all_have_responsibilities() -> None:
    """The reported case: a fitted model (k 8, d 16, full), batches of 300 complete rows
    whose log-densities lie between -700 and -1 600, where exp underflows. Every row has
    responsibilities, equal to scipy's computed in log space."""
    rng = np.random.default_rng(61)
    truth = random_mixture(rng, "full", 8, 16)
    X, _ = truth.sample(20_000, seed=62)
    mixture = fit(X, components=8, seed=63, restarts=1, max_iterations=40).mixture
    far = X[:4_800] + rng.normal(0.0, 1.0, (4_800, 16)) * rng.uniform(15.0, 40.0, (4_800, 1))
    log_density = mixture.log_density(far)
    unusual = far[(log_density < -700) & (log_density > -1_600)]
    assert len(unusual) >= 300
    for start in range(0, len(unusual) - 299, 300):
        batch = unusual[start : start + 300]
        joint = scipy_log_joint(mixture, batch)
        expected = np.exp(joint - logsumexp(joint, axis=1)[:, None])
        np.testing.assert_allclose(mixture.responsibilities(batch), expected, rtol=1e-9,
                                   atol=1e-12)
