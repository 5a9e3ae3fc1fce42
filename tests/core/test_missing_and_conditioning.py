"""Missing features: the marginal density (scipy on the sub-vector and sub-matrix) and
the conditional mean (the Gaussian conditioning formula, solved here with numpy)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import logsumexp
from scipy.stats import multivariate_normal

from core import STRUCTURES, Mixture

from .helpers import full_matrices, random_mixture


def scipy_marginal_log_joint(mixture: Mixture, x: np.ndarray) -> np.ndarray:
    """(k,) log w_j + log N(x_o | mu_jo, S_joo) for one row with NaN entries."""
    observed = ~np.isnan(x)
    return np.array([
        np.log(w) + multivariate_normal(mean[observed], cov[np.ix_(observed, observed)])
        .logpdf(x[observed])
        for w, mean, cov in zip(mixture.weights, mixture.means, full_matrices(mixture),
                                strict=True)
    ])


def with_holes(rng: np.random.Generator, n: int, d: int, patterns: int) -> np.ndarray:
    """Rows with one of a few missing patterns (never all missing), and complete rows."""
    X = rng.standard_normal((n, d)) * 3.0
    masks = rng.random((patterns, d)) < 0.4
    masks[:, 0] = False
    chosen = rng.integers(0, patterns + 1, n)  # the last index means "complete"
    for p in range(patterns):
        X[np.ix_(chosen == p, masks[p])] = np.nan
    return X


@pytest.mark.parametrize("structure", STRUCTURES)
@pytest.mark.parametrize("n", [3, 900, 12_000])
def test_missing_entries_are_marginalised(structure: str, n: int) -> None:
    rng = np.random.default_rng(n)
    mixture = random_mixture(rng, structure, 4, 6)
    X = with_holes(rng, n, 6, patterns=5)
    got = mixture.log_density(X)
    resp = mixture.responsibilities(X)
    for i in range(0, n, max(1, n // 60)):
        joint = scipy_marginal_log_joint(mixture, X[i])
        expected = logsumexp(joint)
        assert got[i] == pytest.approx(expected, rel=1e-9)
        np.testing.assert_allclose(resp[i], np.exp(joint - expected), rtol=1e-9, atol=1e-12)


def conditional_mean_reference(mixture: Mixture, x: np.ndarray) -> np.ndarray:
    """sum_j r_j (mu_jm + S_jmo S_joo^-1 (x_o - mu_jo)), with numpy.linalg.solve."""
    missing = np.isnan(x)
    observed = ~missing
    joint = scipy_marginal_log_joint(mixture, x)
    resp = np.exp(joint - logsumexp(joint))
    filled = np.zeros(missing.sum())
    for r, mean, cov in zip(resp, mixture.means, full_matrices(mixture), strict=True):
        s_oo = cov[np.ix_(observed, observed)]
        s_mo = cov[np.ix_(missing, observed)]
        filled += r * (mean[missing] + s_mo @ np.linalg.solve(s_oo, x[observed] - mean[observed]))
    return filled


@pytest.mark.parametrize("structure", STRUCTURES)
def test_condition_fills_the_conditional_mean(structure: str) -> None:
    rng = np.random.default_rng(11)
    mixture = random_mixture(rng, structure, 3, 5)
    X = with_holes(rng, 200, 5, patterns=4)
    filled = mixture.condition(X)
    complete = ~np.isnan(X).any(axis=1)
    np.testing.assert_array_equal(filled[complete], X[complete])
    for i in np.flatnonzero(~complete):
        missing = np.isnan(X[i])
        np.testing.assert_allclose(filled[i, missing], conditional_mean_reference(mixture, X[i]),
                                   rtol=1e-9, atol=1e-12)
        np.testing.assert_array_equal(filled[i, ~missing], X[i, ~missing])


def test_condition_of_one_gaussian_is_linear_regression() -> None:
    """For a bivariate normal, E[y | x] = mu_y + rho sigma_y / sigma_x (x - mu_x)."""
    mixture = Mixture([1.0], [[1.0, -2.0]], [[[4.0, 1.2], [1.2, 1.0]]])
    x = np.array([[3.0, np.nan], [-1.0, np.nan]])
    expected = -2.0 + 1.2 / 4.0 * (x[:, 0] - 1.0)
    np.testing.assert_allclose(mixture.condition(x)[:, 1], expected, rtol=1e-12)


@pytest.mark.parametrize("structure", STRUCTURES)
def test_marginal_matches_scipy_on_the_subset(structure: str) -> None:
    rng = np.random.default_rng(12)
    mixture = random_mixture(rng, structure, 3, 6)
    features = [4, 1, 2]
    marginal = mixture.marginal(features)
    X = rng.standard_normal((50, 3))
    padded = np.full((50, 6), np.nan)
    padded[:, features] = X
    expected = [logsumexp(scipy_marginal_log_joint(mixture, row)) for row in padded]
    np.testing.assert_allclose(marginal.log_density(X), expected, rtol=1e-9)
    assert marginal.structure == structure


def test_a_row_with_nothing_observed_is_an_error() -> None:
    mixture = Mixture([1.0], [[0.0, 0.0]], [1.0], "spherical")
    X = np.array([[0.0, 1.0], [np.nan, np.nan]])
    with pytest.raises(ValueError, match=r"^X\[1\] has no observed feature$"):
        mixture.log_density(X)
    with pytest.raises(ValueError, match=r"^X\[1\] has no observed feature$"):
        mixture.condition(X)


def test_infinite_entries_are_an_error_not_a_missing_value() -> None:
    mixture = Mixture([1.0], [[0.0, 0.0]], [1.0], "spherical")
    X = np.zeros((30, 2))
    X[17, 1] = -np.inf
    message = r"^X must not contain infinite values; X\[17, 1\] is inf$"
    with pytest.raises(ValueError, match=message):
        mixture.log_density(X)


def test_threads_scoring_many_missing_patterns_share_the_marginals_safely() -> None:
    """Four threads, 600 distinct patterns each (more than the marginals kept): every
    answer equals the one a single thread gives; eviction under the others' feet used
    to raise KeyError."""
    import sys
    from concurrent.futures import ThreadPoolExecutor

    rng = np.random.default_rng(12)
    mixture = random_mixture(rng, "full", 3, 12)
    batches = []
    for _ in range(4):
        X, _ = mixture.sample(600, seed=int(rng.integers(1 << 30)))
        codes = rng.choice(2**12 - 2, 600, replace=False) + 1
        X[((codes[:, None] >> np.arange(12)) & 1).astype(bool)] = np.nan
        batches.append(X)
    expected = [Mixture(mixture.weights, mixture.means, mixture.covariances).log_density(X)
                for X in batches]
    switch = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)  # threads change hands as often as they can
    try:
        with ThreadPoolExecutor(4) as pool:
            found = list(pool.map(mixture.log_density, batches))
    finally:
        sys.setswitchinterval(switch)
    for got, want in zip(found, expected, strict=True):
        np.testing.assert_array_equal(got, want)


def test_blocks_of_bounded_memory_change_no_answer(monkeypatch: pytest.MonkeyPatch) -> None:
    """Conditioning and explaining work in blocks whose temporaries stay within a few
    MiB, whatever the batch: blocks of 64 rows give the answers of one block."""
    from core import _mixture

    rng = np.random.default_rng(13)
    mixture = random_mixture(rng, "full", 3, 5)
    X, _ = mixture.sample(700, seed=14)
    gappy = X.copy()
    gappy[::3, 1] = np.nan
    gappy[::7, 4] = np.nan
    whole = (mixture.condition(gappy), mixture.explain(X), mixture.explain(gappy))
    monkeypatch.setattr(_mixture, "TEMPORARY_BYTES", 1)
    blocked = (mixture.condition(gappy), mixture.explain(X), mixture.explain(gappy))
    np.testing.assert_allclose(blocked[0], whole[0], rtol=1e-13)
    for found, expected in zip(blocked[1:], whole[1:], strict=True):
        for name in ("conditional_log_density", "conditional_tail", "conditional_mean",
                     "conditional_sd", "most_unusual"):
            np.testing.assert_allclose(getattr(found, name), getattr(expected, name),
                                       rtol=1e-12)


@pytest.mark.parametrize("structure", STRUCTURES)
def test_rows_of_distinct_missing_patterns_match_scipy(structure: str) -> None:
    """Rows of patterns too rare to compile a marginal for are scored together, each
    row's observed blocks factorised at once; far rows (log-densities near -1e3, whose
    exponentials underflow) still get responsibilities. scipy.stats reference."""
    rng = np.random.default_rng(21)
    mixture = random_mixture(rng, structure, 4, 8)
    X = rng.standard_normal((200, 8)) * 3.0
    X[::7] *= 12.0
    codes = rng.choice(2**8 - 2, 200, replace=False) + 1
    X[((codes[:, None] >> np.arange(8)) & 1).astype(bool)] = np.nan
    got, resp = mixture.log_density(X), mixture.responsibilities(X)
    assert got.min() < -700
    for i in range(200):
        joint = scipy_marginal_log_joint(mixture, X[i])
        expected = logsumexp(joint)
        assert got[i] == pytest.approx(expected, rel=1e-9)
        np.testing.assert_allclose(resp[i], np.exp(joint - expected), rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("structure", STRUCTURES)
def test_rows_scored_under_many_patterns_match_scipy_plain_or_prepared(structure: str) -> None:
    """Complete rows scored under the marginal of each of many missing patterns (the
    training sample, for tail fractions): from the observed blocks, or, prepared, from
    the conditional of the missing features; both equal scipy.stats on the sub-vector,
    for every number of missing features, including rows far from every component."""
    rng = np.random.default_rng(23)
    mixture = random_mixture(rng, structure, 3, 7)
    rows = rng.standard_normal((40, 7)) * 3.0
    rows[::9] *= 15.0
    patterns = ((np.arange(1, 2**7 - 1)[:, None] >> np.arange(7)) & 1).astype(bool)
    plain = mixture.marginal_log_densities(rows, patterns)
    prepared = mixture.marginal_log_densities(mixture.prepare(rows), patterns)
    assert plain.min() < -300
    for p in range(0, len(patterns), 5):
        x = rows.copy()
        x[:, patterns[p]] = np.nan
        expected = [logsumexp(scipy_marginal_log_joint(mixture, row)) for row in x]
        np.testing.assert_allclose(plain[p], expected, rtol=1e-9)
        np.testing.assert_allclose(prepared[p], expected, rtol=1e-9)
