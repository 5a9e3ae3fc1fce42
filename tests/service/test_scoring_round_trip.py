"""Import a parameter set over HTTP, score it, and check against scipy.stats
(multivariate_normal and logsumexp) for every structure and wire format."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from scipy.special import logsumexp
from scipy.stats import multivariate_normal

from core import STRUCTURES

from ..core.helpers import full_matrices, random_mixture
from .wire import body_of, mixture_body, post, unpacked

FORMATS = ["json", "msgpack", "packed"]


def scipy_log_joint(mixture: Any, X: np.ndarray) -> np.ndarray:
    observed = ~np.isnan(X)
    out = np.empty((len(X), mixture.components))
    for i, (x, seen) in enumerate(zip(X, observed, strict=True)):
        for j, (w, mean, cov) in enumerate(zip(mixture.weights, mixture.means,
                                               full_matrices(mixture), strict=True)):
            out[i, j] = np.log(w) + multivariate_normal(mean[seen], cov[np.ix_(seen, seen)]
                                                        ).logpdf(x[seen])
    return out


@pytest.mark.parametrize("fmt", FORMATS)
@pytest.mark.parametrize("structure", STRUCTURES)
def test_import_then_score_matches_scipy(client: Any, structure: str, fmt: str) -> None:
    rng = np.random.default_rng(len(structure))
    mixture = random_mixture(rng, structure, 3, 4)
    created = post(client, "/v1/models/turbine-7/versions", mixture_body(mixture), fmt)
    assert created.status_code == 201, created.text
    assert created.headers["location"] == "/v1/models/turbine-7/versions/1"
    assert body_of(created) == {"model": "turbine-7", "version": 1, "serving": True}

    X = rng.standard_normal((25, 4)) * 3
    X[3, 1] = np.nan  # a sensor dropout: scored on the observed features
    X[7, [0, 2]] = np.nan
    joint = scipy_log_joint(mixture, X)
    expected = logsumexp(joint, axis=1)
    rows = [[None if np.isnan(v) else float(v) for v in row] for row in X]
    points = rows if fmt == "json" else X.tolist() if fmt == "msgpack" else X

    scored = post(client, "/v1/models/turbine-7/log-density", {"points": points}, fmt)
    assert scored.status_code == 200, scored.text
    answer = body_of(scored)
    assert (answer["model"], answer["version"]) == ("turbine-7", 1)
    np.testing.assert_allclose(unpacked(answer["log_density"]), expected, rtol=1e-9)
    assert answer["tail_fraction"] is None  # an import has no training quantiles
    assert isinstance(answer["log_density"], dict) == (fmt == "packed")

    resp = body_of(post(client, "/v1/models/turbine-7/responsibilities", {"points": points}, fmt))
    probabilities = unpacked(resp["responsibilities"])
    np.testing.assert_allclose(probabilities, np.exp(joint - expected[:, None]), rtol=1e-9,
                               atol=1e-12)
    np.testing.assert_array_equal(unpacked(resp["labels"]), probabilities.argmax(axis=1))

    filled = unpacked(body_of(post(client, "/v1/models/turbine-7/conditional",
                                   {"points": points}, fmt))["points"])
    np.testing.assert_allclose(filled, mixture.condition(X), rtol=1e-12)
    assert not np.isnan(filled).any()


@pytest.mark.parametrize("fmt", FORMATS)
def test_samples_are_seeded_and_bounded(client: Any, fmt: str) -> None:
    mixture = random_mixture(np.random.default_rng(1), "full", 2, 3)
    post(client, "/v1/models/m/versions", mixture_body(mixture), fmt)
    body = {"count": 50, "seed": 9, "packed": fmt == "packed"}
    first = body_of(post(client, "/v1/models/m/samples", body, fmt))
    again = body_of(post(client, "/v1/models/m/samples", body, fmt))
    points, components = mixture.sample(50, seed=9)
    np.testing.assert_allclose(unpacked(first["points"]), points, rtol=1e-12)
    np.testing.assert_array_equal(unpacked(first["components"]), components)
    assert first == again
    assert first["seed"] == 9
    unseeded = body_of(post(client, "/v1/models/m/samples", {"count": 5}, fmt))
    assert isinstance(unseeded["seed"], int)
