"""Starting points for EM, drawn from the reservoir sample.

``kmeans++``: D^2 seeding (Arthur & Vassilvitskii, 2007), refined by a few
weighted Lloyd iterations; the clusters give the first weights, means and
covariances. ``random``: k sample rows as means, the data covariance for every
component, equal weights. Both work on standardised features so that a feature
in large units (say rpm) does not decide the clusters alone.
"""

from __future__ import annotations

import numpy as np

from ._validation import FloatArray

INIT_METHODS = ("kmeans++", "random")
#: Rows of the sample used to seed one restart.
INIT_ROWS = 16_384
LLOYD_ITERATIONS = 20


def seed_labels(
    standard: FloatArray, weights: FloatArray, components: int, method: str,
    rng: np.random.Generator,
) -> tuple[np.ndarray, FloatArray]:
    """Cluster labels of the (standardised) rows and the chosen centres."""
    if method == "random":
        chosen = rng.choice(standard.shape[0], size=components, replace=False,
                            p=weights / weights.sum())
        centers = standard[chosen]
        return _nearest(standard, centers), centers
    centers = _kmeans_plus_plus(standard, weights, components, rng)
    labels = _nearest(standard, centers)
    for _ in range(LLOYD_ITERATIONS):
        counts = np.bincount(labels, weights=weights, minlength=components)
        sums = np.zeros_like(centers)
        np.add.at(sums, labels, standard * weights[:, None])
        occupied = counts > 0
        centers = centers.copy()
        centers[occupied] = sums[occupied] / counts[occupied, None]
        updated = _nearest(standard, centers)
        if np.array_equal(updated, labels):
            break
        labels = updated
    return labels, centers


def _kmeans_plus_plus(
    rows: FloatArray, weights: FloatArray, components: int, rng: np.random.Generator
) -> FloatArray:
    first = rng.choice(rows.shape[0], p=weights / weights.sum())
    centers = [rows[first]]
    closest = ((rows - rows[first]) ** 2).sum(axis=1)
    for _ in range(1, components):
        mass = weights * closest
        total = mass.sum()
        if total <= 0:  # fewer distinct rows than components: any row will do
            index = rng.choice(rows.shape[0])
        else:
            index = rng.choice(rows.shape[0], p=mass / total)
        centers.append(rows[index])
        closest = np.minimum(closest, ((rows - rows[index]) ** 2).sum(axis=1))
    return np.array(centers)


def _nearest(rows: FloatArray, centers: FloatArray) -> np.ndarray:
    distances = (centers**2).sum(axis=1) - 2.0 * rows @ centers.T
    return np.argmin(distances, axis=1)
