"""Property tests (hypothesis) on invented mixtures: invariants that must always hold."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from core import STRUCTURES, Mixture

from .helpers import full_matrices, random_mixture

mixtures = st.builds(
    lambda seed, structure, k, d: random_mixture(np.random.default_rng(seed), structure, k, d),
    seed=st.integers(0, 2**32 - 1),
    structure=st.sampled_from(STRUCTURES),
    k=st.integers(1, 6),
    d=st.integers(1, 6),
)
rows = st.integers(1, 600)
SETTINGS = settings(max_examples=60, deadline=None)


def points_for(mixture: Mixture, n: int, seed: int) -> np.ndarray:
    return np.random.default_rng(seed).standard_normal((n, mixture.dimension)) * 4.0


@SETTINGS
@given(mixtures, rows, st.integers(0, 2**16))
def test_permuting_components_changes_nothing(mixture: Mixture, n: int, seed: int) -> None:
    order = np.random.default_rng(seed).permutation(mixture.components)
    covariances = mixture.covariances if mixture.structure == "shared" else mixture.covariances[
        order]
    permuted = Mixture(mixture.weights[order], mixture.means[order], covariances,
                       mixture.structure)
    X = points_for(mixture, n, seed)
    np.testing.assert_allclose(permuted.log_density(X), mixture.log_density(X), rtol=1e-11)
    np.testing.assert_allclose(permuted.responsibilities(X), mixture.responsibilities(X)[:, order],
                               rtol=1e-9, atol=1e-13)


@SETTINGS
@given(mixtures, rows, st.integers(0, 2**16))
def test_responsibilities_are_probabilities(mixture: Mixture, n: int, seed: int) -> None:
    resp = mixture.responsibilities(points_for(mixture, n, seed))
    assert (resp >= 0).all()
    np.testing.assert_allclose(resp.sum(axis=1), 1.0, rtol=1e-12)


@SETTINGS
@given(mixtures, rows, st.integers(0, 2**16))
def test_log_density_is_the_log_of_the_naive_density(mixture: Mixture, n: int,
                                                     seed: int) -> None:
    """Sum of w_j (2 pi)^(-d/2) det(S_j)^(-1/2) exp(-q_j / 2) with an explicit inverse."""
    X = np.random.default_rng(seed).standard_normal((n, mixture.dimension))
    density = np.zeros(n)
    for w, mean, cov in zip(mixture.weights, mixture.means, full_matrices(mixture), strict=True):
        diff = X - mean
        q = np.einsum("ni,ij,nj->n", diff, np.linalg.inv(cov), diff)
        norm = (2 * np.pi) ** (-mixture.dimension / 2) / np.sqrt(np.linalg.det(cov))
        density += w * norm * np.exp(-q / 2)
    keep = density > 1e-250  # the naive sum underflows where the log-space one does not
    np.testing.assert_allclose(mixture.log_density(X)[keep], np.log(density[keep]), rtol=1e-9)


@SETTINGS
@given(mixtures, st.integers(0, 2**16))
def test_missing_everything_but_one_feature_is_the_one_dimensional_marginal(
        mixture: Mixture, seed: int) -> None:
    rng = np.random.default_rng(seed)
    X = points_for(mixture, 20, seed)
    keep = int(rng.integers(mixture.dimension))
    holes = np.full_like(X, np.nan)
    holes[:, keep] = X[:, keep]
    np.testing.assert_allclose(mixture.log_density(holes),
                               mixture.marginal([keep]).log_density(X[:, [keep]]), rtol=1e-12)
