"""The fit report: an HTML page whose plots render in a real browser (Debian's chromium,
driven by Playwright) with no console error."""

from __future__ import annotations

from collections.abc import Iterator

import httpx
import numpy as np
import pytest

from service.client import Client
from service.embedded import EmbeddedRedis

from .browser import opened
from .servers import api_process, worker_process
from .test_jobs import training


@pytest.fixture(scope="module")
def url(redis_server: EmbeddedRedis) -> Iterator[str]:
    with api_process(redis_server.url, "report-tests") as base, \
            worker_process(redis_server.url, "report-tests"):
        with Client(base) as mixscore:
            X = np.column_stack([training(1_500, seed=8), np.random.default_rng(8).normal(
                size=1_500) * 10])
            X[:, 1] *= 3  # variances about 10 (speed), 95 (load) and 100 (noise)
            mixscore.fit("reported", X, components=(1, 3), structure=["full", "diagonal"],
                         feature_names=["speed", "load", "noise"], seed=3, serve=True)
            mixscore.import_version("imported", {
                "structure": "spherical", "weights": [1.0], "means": [[0.0, 0.0]],
                "covariances": [1.0]})
            mixscore.import_version("one-feature", {
                "structure": "diagonal", "weights": [0.5, 0.5], "means": [[0.0], [3.0]],
                "covariances": [[1.0], [2.0]]})
        yield base


def test_the_report_of_a_fitted_version_has_four_plots(url: str) -> None:
    page = httpx.get(f"{url}/v1/models/reported/versions/1/report")
    assert page.status_code == 200
    assert page.headers["content-type"] == "text/html; charset=utf-8"
    assert page.text.count('<img src="data:image/png;base64,') == 4
    # The pair defaults to the two features that separate the components, not to the two
    # of largest variance (noise, sd 10, and load).
    assert 'alt="speed against load"' in page.text
    assert "the star marks the chosen candidate (2 components, diagonal)" in page.text
    assert "coloured by component (legend)" in page.text and "(colour scale)" in page.text
    assert "training rows (of the" in page.text  # a fitted version plots its own rows
    options = page.text.split("<h3>Fit options</h3>")[1]
    assert '<td><span class="key">structures</span></td><td>full, diagonal</td>' in options
    chosen = httpx.get(f"{url}/v1/models/reported/versions/1/report",
                       params={"x": "speed", "y": "2"})
    assert 'alt="speed against noise"' in chosen.text


def test_an_imported_version_has_only_its_pair_plot(url: str) -> None:
    page = httpx.get(f"{url}/v1/models/imported/versions/1/report")
    assert page.status_code == 200
    assert page.text.count("<img ") == 1
    assert "Imported parameters: no fit report." in page.text


def test_bad_report_requests_are_problems(url: str) -> None:
    wrong = httpx.get(f"{url}/v1/models/reported/versions/1/report", params={"x": "torque"})
    assert wrong.status_code == 422
    assert wrong.json()["errors"][0] == {
        "field": "x", "message": "must be a feature name or an index below 3; the features "
                                 "are speed, load, noise"}
    assert httpx.get(f"{url}/v1/models/reported/versions/9/report").status_code == 404
    same = httpx.get(f"{url}/v1/models/reported/versions/1/report", params={"y": "0"})
    assert same.status_code == 422  # y is the default x (speed): one feature twice
    assert same.json()["errors"][0] == {"field": "y", "message": "must differ from x (speed)"}


def test_a_model_of_one_feature_has_no_pair_plot(url: str) -> None:
    page = httpx.get(f"{url}/v1/models/one-feature/versions/1/report")
    assert page.status_code == 200
    assert "<img " not in page.text and "one feature" in page.text


def test_the_page_renders_in_chromium_without_console_errors(url: str) -> None:
    with opened(f"{url}/v1/models/reported/versions/1/report", "fit-report.png") as (
            page, problems):
        images = page.eval_on_selector_all(
            "img", "all => all.map(i => [i.complete, i.naturalWidth, i.naturalHeight])")
    assert len(images) == 4
    assert all(complete and width > 300 and height > 200 for complete, width, height in images)
    assert problems == []


def test_the_default_pair_maximises_fishers_criterion() -> None:
    """Against trace(W^-1 B) (Fisher's criterion) computed by numpy's solve on each pair."""
    from core import Mixture
    from service.report import default_pair, per_component

    from ..core.helpers import random_mixture

    rng = np.random.default_rng(11)
    for structure in ("full", "diagonal", "spherical", "shared"):
        mixture = random_mixture(rng, structure, 3, 5)
        within = np.einsum("k,kij->ij", mixture.weights, per_component(mixture))
        centred = mixture.means - mixture.weights @ mixture.means
        between = (centred.T * mixture.weights) @ centred
        scores = {(i, j): np.trace(np.linalg.solve(within[np.ix_([i, j], [i, j])],
                                                   between[np.ix_([i, j], [i, j])]))
                  for i in range(5) for j in range(i + 1, 5)}
        assert default_pair(mixture) == max(scores, key=lambda pair: scores[pair])
    one = Mixture([1.0], [[0.0, 0.0, 0.0]], [[1.0, 1.0, 1.0]], "diagonal")
    assert default_pair(one) == (0, 1)
