"""An independent reference for fit fidelity: textbook EM (Dempster, Laird & Rubin, 1977)
with only a ridge (per feature), densities by ``scipy.stats.multivariate_normal``, started
from the generating parameters; and seeded mixtures with thin but well-sampled
directions (invented data). Used by tests/core/test_fit_fidelity.py and
loadtests/bench_core.py."""

from __future__ import annotations

import numpy as np
from scipy import stats
from scipy.special import logsumexp


def thin_mixture(rng: np.random.Generator, d: int, k: int, condition: float,
                 thin: int = 3, separation: float = 12.0
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Weights, means and full covariances whose ``thin`` smallest eigenvalues are
    1/``condition`` to 3/``condition`` of the others (0.3 to 1): near-collinear sensors."""
    weights = rng.dirichlet(np.full(k, 5.0))
    means = rng.standard_normal((k, d)) * separation
    covariances = []
    for _ in range(k):
        rotation = stats.ortho_group.rvs(d, random_state=rng)
        eigenvalues = np.exp(rng.uniform(np.log(0.3), 0.0, d))
        eigenvalues[:thin] = np.exp(rng.uniform(np.log(1 / condition), np.log(3 / condition),
                                                thin))
        covariances.append((rotation * eigenvalues) @ rotation.T)
    return weights, means, np.array(covariances)


def draw(rng: np.random.Generator, weights: np.ndarray, means: np.ndarray,
         covariances: np.ndarray, rows: int) -> np.ndarray:
    labels = rng.choice(len(weights), rows, p=weights)
    factors = np.linalg.cholesky(covariances)
    noise = rng.standard_normal((rows, means.shape[1]))
    return means[labels] + np.einsum("nij,nj->ni", factors[labels], noise)


def plain_em(X: np.ndarray, weights: np.ndarray, means: np.ndarray, covariances: np.ndarray,
             ridge: float | np.ndarray = 1e-6, tolerance: float = 1e-10, iterations: int = 2000
             ) -> tuple[float, np.ndarray, np.ndarray]:
    """The converged mean log-likelihood per row, and the weights and means."""
    n, d = X.shape
    previous = -np.inf
    for _ in range(iterations):
        joint = np.stack([np.log(w) + stats.multivariate_normal(m, c).logpdf(X)
                          for w, m, c in zip(weights, means, covariances, strict=True)], axis=1)
        total = logsumexp(joint, axis=1)
        mean_log_likelihood = float(total.mean())
        if abs(mean_log_likelihood - previous) < tolerance:
            break
        previous = mean_log_likelihood
        resp = np.exp(joint - total[:, None])
        counts = resp.sum(axis=0)
        weights = counts / n
        means = resp.T @ X / counts[:, None]
        covariances = np.stack([(resp[:, j, None] * (X - means[j])).T @ (X - means[j])
                                / counts[j] + np.diag(np.broadcast_to(ridge, (d,)))
                                for j in range(len(counts))])
    return mean_log_likelihood, weights, means
