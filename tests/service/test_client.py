"""service.client against a real `mixscore serve` and fit worker, sync and async."""

from __future__ import annotations

import asyncio
from collections.abc import Iterator

import numpy as np
import pytest
from scipy.special import logsumexp
from scipy.stats import multivariate_normal

from core import Mixture
from service.client import AsyncClient, Client, InvalidInputError, NotFoundError
from service.embedded import EmbeddedRedis

from .servers import api_process, worker_process
from .test_jobs import training

MODEL = {"structure": "diagonal", "weights": [0.3, 0.7], "means": [[0.0, 0.0], [4.0, 1.0]],
         "covariances": [[1.0, 2.0], [0.5, 0.25]]}


def scipy_log_density(X: np.ndarray) -> np.ndarray:
    """Reference: scipy.stats.multivariate_normal and logsumexp over the components."""
    parts = [np.log(w) + multivariate_normal(m, np.diag(c)).logpdf(X)
             for w, m, c in zip(MODEL["weights"], MODEL["means"], MODEL["covariances"],
                                strict=True)]
    return logsumexp(np.column_stack(parts), axis=1)  # type: ignore[no-any-return]


@pytest.fixture(scope="module")
def url(redis_server: EmbeddedRedis) -> Iterator[str]:
    with api_process(redis_server.url, "client-tests") as base, \
            worker_process(redis_server.url, "client-tests"):
        yield base


def test_scores_come_back_as_arrays_equal_to_scipy(url: str) -> None:
    X = np.random.default_rng(3).normal(size=(257, 2)) * 3
    with Client(url) as mixscore:
        created = mixscore.import_version("reference", MODEL, serve=True)
        scores = mixscore.log_density("reference", X)
        assigned = mixscore.responsibilities("reference", X)
    assert (created.version, scores.version) == (1, 1)
    np.testing.assert_allclose(scores.log_density, scipy_log_density(X), rtol=1e-10)
    assert scores.tail_fraction is None  # an imported version has no training quantiles
    np.testing.assert_allclose(assigned.responsibilities.sum(axis=1), 1.0, rtol=1e-12)
    assert assigned.labels.tolist() == assigned.responsibilities.argmax(axis=1).tolist()


def test_explain_takes_rows_columns_by_name_and_data_frames(url: str) -> None:
    """The same rows as an array, a mapping of columns in another order, and a pandas
    DataFrame: one answer, checked against the core's (itself checked against scipy)."""
    import pandas as pd

    named = {**MODEL, "feature_names": ["power_kw", "oil_temp_c"]}
    X = np.array([[0.5, 0.2], [4.0, 9.0], [np.nan, 1.0]])
    columns = {"oil_temp_c": X[:, 1], "power_kw": X[:, 0]}
    with Client(url) as mixscore:
        mixscore.import_version("named", named, serve=True)
        by_rows = mixscore.explain("named", X)
        by_columns = mixscore.explain("named", columns)
        by_frame = mixscore.explain("named", pd.DataFrame(columns))
        scores = mixscore.log_density("named", pd.DataFrame(columns))
    expected = Mixture(MODEL["weights"], MODEL["means"], MODEL["covariances"],
                       "diagonal").explain(X)
    for found in (by_rows, by_columns, by_frame):
        assert found.feature_names == ["power_kw", "oil_temp_c"]
        np.testing.assert_allclose(found.conditional_tail, expected.conditional_tail,
                                   rtol=1e-12)
        np.testing.assert_allclose(found.conditional_mean, expected.conditional_mean,
                                   rtol=1e-12)
        assert found.most_unusual.tolist() == [0, 1, 1]
    np.testing.assert_allclose(scores.log_density[:2], scipy_log_density(X[:2]), rtol=1e-10)


def test_upload_fit_with_progress_then_score_missing_features(url: str) -> None:
    X = training(3_000, seed=4)
    seen: list[str] = []
    with Client(url) as mixscore:
        dataset = mixscore.upload(X, feature_names=["a", "b"], chunk_rows=700)
        assert (dataset.rows, dataset.chunks) == (3_000, 5)
        job = mixscore.fit("fitted", dataset=dataset.id, components=(1, 3),
                           structure=["spherical", "diagonal"], seed=2, serve=True,
                           resolution=np.array([0.01, 0.0]),
                           progress=lambda j: seen.append(j.state))
        gappy = np.array([[0.2, np.nan], [5.5, 6.1]])
        scores = mixscore.log_density("fitted", gappy)
        filled = mixscore.conditional("fitted", gappy)
        version = mixscore.version("fitted", 1)
        options = version.provenance["options"]
    assert options["resolution"] == [0.01, 0.0]
    assert job.state == "succeeded" and job.version == 1
    assert seen[-1] == "succeeded" and len(seen) >= 2
    assert scores.tail_fraction is not None
    assert 0 <= scores.tail_fraction[1] <= 1
    # The row missing its second feature, against the first feature's marginal of the
    # training rows (all 3 000 are kept), computed here from the version's parameters:
    # not a small tail, so answered from a 1 000-row pilot, within its band (the
    # Dvoretzky-Kiefer-Wolfowitz bound with Massart's constant, risk 1e-3).
    p = version.parameters
    first = Mixture(p.weights, p.means, p.covariances, p.structure).marginal([0])
    expected = np.mean(first.log_density(X[:, [0]]) < first.log_density(gappy[:1, [0]])[0])
    assert expected > 0.05
    assert abs(scores.tail_fraction[0] - expected) <= np.sqrt(np.log(2e3) / 2e3)
    assert filled[1].tolist() == [5.5, 6.1] and np.isfinite(filled[0, 1])


def test_errors_are_typed_and_carry_the_problem(url: str) -> None:
    with Client(url) as mixscore:
        with pytest.raises(NotFoundError) as missing:
            mixscore.log_density("no-such-model", [[0.0, 0.0]])
        mixscore.import_version("typed", MODEL, serve=True)
        with pytest.raises(InvalidInputError) as wrong:
            mixscore.log_density("typed", [[0.0, 0.0, 0.0]])
    assert missing.value.status == 404
    assert missing.value.problem["detail"] == "model 'no-such-model' does not exist"
    assert wrong.value.status == 422
    assert wrong.value.problem["errors"][0]["field"] == "points"


def test_the_async_client_does_the_same(url: str) -> None:
    async def run() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        async with AsyncClient(url) as mixscore:
            await mixscore.import_version("async", MODEL, serve=True)
            drawn = await mixscore.sample("async", 500, seed=9)
            again = await mixscore.sample("async", 500, seed=9)
            scores = await mixscore.log_density("async", drawn.points)
            assert np.array_equal(drawn.points, again.points)
            return drawn.points, drawn.components, scores.log_density

    points, components, log_density = asyncio.run(run())
    assert points.shape == (500, 2) and set(components.tolist()) <= {0, 1}
    np.testing.assert_allclose(log_density, scipy_log_density(points), rtol=1e-10)
