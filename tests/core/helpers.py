"""Random parameter sets for tests (invented data, for checks against references)."""

from __future__ import annotations

import numpy as np

from core import Mixture


def random_spd(rng: np.random.Generator, d: int, condition: float = 50.0) -> np.ndarray:
    """A random SPD matrix with eigenvalues spread over [1, condition]."""
    q, _ = np.linalg.qr(rng.standard_normal((d, d)))
    eigenvalues = np.exp(rng.uniform(0.0, np.log(condition), d))
    return (q * eigenvalues) @ q.T


def random_mixture(rng: np.random.Generator, structure: str, k: int, d: int,
                   spread: float = 3.0) -> Mixture:
    weights = rng.dirichlet(np.full(k, 2.0))
    means = rng.standard_normal((k, d)) * spread
    covariances = {
        "full": lambda: np.stack([random_spd(rng, d) for _ in range(k)]),
        "diagonal": lambda: rng.uniform(0.3, 3.0, (k, d)),
        "spherical": lambda: rng.uniform(0.3, 3.0, k),
        "shared": lambda: random_spd(rng, d),
    }[structure]()
    return Mixture(weights, means, covariances, structure)


def full_matrices(mixture: Mixture) -> np.ndarray:
    """The (k, d, d) covariance matrices, built here from the public parameters."""
    k, d = mixture.components, mixture.dimension
    c = mixture.covariances
    if mixture.structure == "full":
        return np.array(c)
    if mixture.structure == "diagonal":
        return np.stack([np.diag(row) for row in c])
    if mixture.structure == "spherical":
        return np.stack([v * np.eye(d) for v in c])
    return np.repeat(np.asarray(c)[None], k, axis=0)
