"""Construction checks: every message names the argument (and component), word for word."""

from __future__ import annotations

import json

import numpy as np
import pytest

from core import STRUCTURES, Mixture

from .helpers import random_mixture

EYE2 = np.eye(2)


@pytest.mark.parametrize(
    ("weights", "means", "covariances", "structure", "message"),
    [
        ([1.0], [[0.0]], [[[1.0]]], "banana",
         "structure must be one of full, diagonal, spherical, shared; got 'banana'"),
        ([1.0], [0.0, 1.0], [[[1.0]]], "full",
         "means must be 2-D (k, d) with k >= 1 and d >= 1; got shape (2,)"),
        ([1.0], np.zeros((1, 0)), [[[1.0]]], "full",
         "means must be 2-D (k, d) with k >= 1 and d >= 1; got shape (1, 0)"),
        ([0.5, 0.5], [[0.0, 0.0]], [EYE2], "full", "weights must have shape (1,); got (2,)"),
        ([0.5, 0.6], [[0.0, 0.0], [1.0, 1.0]], [EYE2, EYE2], "full",
         "weights must sum to 1 (within 1e-06); they sum to 1.1"),
        ([1.5, -0.5], [[0.0, 0.0], [1.0, 1.0]], [EYE2, EYE2], "full",
         "weights must be non-negative; weights[1] is -0.5"),
        ([1.0], [[0.0, np.nan]], [EYE2], "full", "means must be finite; means[0, 1] is nan"),
        ([1.0], [[0.0, 0.0]], [[[1.0, 0.5], [0.4, 1.0]]], "full",
         "covariances[0] must be symmetric (within 1e-08 of its largest entry)"),
        ([0.5, 0.5], [[0.0, 0.0], [1.0, 1.0]], [EYE2, [[1.0, 2.0], [2.0, 1.0]]], "full",
         "covariances[1] is not positive definite"),
        ([1.0], [[0.0, 0.0]], EYE2, "full", "covariances must have shape (1, 2, 2); got (2, 2)"),
        ([1.0], [[0.0, 0.0]], [[1.0, 0.0]], "diagonal",
         "covariances[0, 1] must be a positive variance"),
        ([0.5, 0.5], [[0.0], [1.0]], [1.0, -2.0], "spherical",
         "covariances[1] must be a positive variance"),
        ([1.0], [[0.0, 0.0]], [[1.0, 0.0], [0.0, 0.0]], "shared",
         "covariances is not positive definite"),
        ([1.0], [[0.0, 0.0]], [[1.0, np.inf], [np.inf, 1.0]], "shared",
         "covariances must be finite; covariances[0, 1] is inf"),
        (["a"], [[0.0]], [[[1.0]]], "full",
         "weights must be an array of numbers (could not convert string to float: 'a')"),
    ],
)
def test_bad_parameters_are_named(weights: object, means: object, covariances: object,
                                  structure: str, message: str) -> None:
    with pytest.raises(ValueError) as caught:
        Mixture(weights, means, covariances, structure)
    assert str(caught.value) == message


def test_weights_within_tolerance_are_renormalised() -> None:
    mixture = Mixture([0.3333333, 0.3333333, 0.3333333], [[0.0], [1.0], [2.0]], [1.0] * 3,
                      "spherical")
    assert mixture.weights.sum() == pytest.approx(1.0, abs=1e-15)


@pytest.mark.parametrize(
    ("X", "message"),
    [
        (np.zeros(3), "X must be 2-D (n, 3); got shape (3,)"),
        (np.zeros((2, 4)), "X must have 3 columns (the dimension); got 4"),
        ([["x", 1, 2]], "X must be an array of numbers (could not convert string to float: 'x')"),
    ],
)
def test_bad_points_are_named(X: object, message: str) -> None:
    mixture = Mixture([1.0], [[0.0, 0.0, 0.0]], [1.0], "spherical")
    with pytest.raises(ValueError) as caught:
        mixture.log_density(X)
    assert str(caught.value) == message


@pytest.mark.parametrize("features", [[], [0, 0], [3], [-1], [0.5]])
def test_bad_marginal_features(features: list[float]) -> None:
    mixture = Mixture([1.0], [[0.0, 0.0, 0.0]], [1.0], "spherical")
    with pytest.raises(ValueError, match=r"^features must be distinct indices in \[0, 3\)"):
        mixture.marginal(features)


@pytest.mark.parametrize("structure", STRUCTURES)
def test_dictionary_round_trip_is_exact_and_json_safe(structure: str) -> None:
    mixture = random_mixture(np.random.default_rng(1), structure, 3, 4)
    data = json.loads(json.dumps(mixture.to_dict()))
    again = Mixture.from_dict(data)
    assert again.structure == structure
    for name in ("weights", "means", "covariances"):
        np.testing.assert_array_equal(getattr(again, name), getattr(mixture, name))


def test_from_dict_checks_the_schema_version() -> None:
    data = Mixture([1.0], [[0.0]], [1.0], "spherical").to_dict()
    data["schema_version"] = 99
    with pytest.raises(ValueError, match=r"^schema_version must be 1; got 99$"):
        Mixture.from_dict(data)
    del data["schema_version"]
    with pytest.raises(ValueError, match=r"^schema_version must be 1; got None$"):
        Mixture.from_dict(data)


def test_parameters_are_read_only() -> None:
    mixture = Mixture([1.0], [[0.0]], [1.0], "spherical")
    with pytest.raises(ValueError, match="read-only"):
        mixture.means[0, 0] = 1.0
