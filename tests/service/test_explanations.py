"""POST /v1/models/{name}/explanations and ``records`` on every scoring endpoint, over
HTTP with a real Redis. Explanations are checked against the scipy reference of
tests/core/test_explain.py (multivariate_normal on sub-matrices, Gaussian conditioning,
norm.cdf/sf); records against the same request sent as points."""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest

from core import Mixture

from ..core.helpers import random_mixture
from ..core.test_explain import reference
from .wire import body_of, mixture_body, post, unpacked

FORMATS = ["json", "msgpack", "packed"]
NAMES = ["power_kw", "rotor_rpm", "oil_temp_c", "vibration_mm_s"]
FIELDS = ("conditional_log_density", "conditional_tail", "conditional_mean", "conditional_sd")


def rows_for(fmt: str, X: np.ndarray) -> Any:
    if fmt == "json":
        return [[None if np.isnan(v) else float(v) for v in row] for row in X]
    return X.tolist() if fmt == "msgpack" else X


@pytest.mark.parametrize("fmt", FORMATS)
def test_explanations_match_scipy(client: Any, fmt: str) -> None:
    rng = np.random.default_rng(31)
    mixture = random_mixture(rng, "full", 3, 4)
    post(client, "/v1/models/nacelle/versions", mixture_body(mixture, feature_names=NAMES))
    X, _ = mixture.sample(12, seed=32)
    X[2] += 6.0
    X[4, 1] = np.nan
    X[5, [0, 3]] = np.nan
    answer = post(client, "/v1/models/nacelle/explanations", {"points": rows_for(fmt, X)}, fmt)
    assert answer.status_code == 200, answer.text
    found = body_of(answer)
    assert (found["model"], found["version"], found["feature_names"]) == ("nacelle", 1, NAMES)
    assert isinstance(found["conditional_tail"], dict) == (fmt == "packed")
    got = {field: unpacked(found[field]) for field in FIELDS}
    for i, row in enumerate(X):
        for j in range(4):
            if np.isnan(row[j]):
                assert all(np.isnan(got[field][i, j]) for field in FIELDS)
                continue
            np.testing.assert_allclose([got[field][i, j] for field in FIELDS],
                                       reference(mixture, row, j), rtol=1e-9, atol=1e-300)
    tails = np.where(np.isnan(got["conditional_tail"]), np.inf, got["conditional_tail"])
    np.testing.assert_array_equal(unpacked(found["most_unusual"]), tails.argmin(axis=1))
    if fmt == "json":  # a missing feature is null, not NaN
        assert found["conditional_mean"][4][1] is None


@pytest.mark.parametrize("endpoint", ["log-density", "responsibilities", "conditional",
                                      "explanations"])
@pytest.mark.parametrize("fmt", ["json", "msgpack"])
def test_records_answer_as_points_in_model_order(client: Any, endpoint: str, fmt: str) -> None:
    mixture = random_mixture(np.random.default_rng(33), "diagonal", 2, 4)
    post(client, "/v1/models/nacelle/versions", mixture_body(mixture, feature_names=NAMES))
    X = np.array([[1.0, 2.0, 3.0, 4.0], [0.5, np.nan, -1.0, 2.0], [np.nan, 1.0, np.nan, 0.0]])
    records = [
        {"vibration_mm_s": 4.0, "oil_temp_c": 3.0, "rotor_rpm": 2.0, "power_kw": 1.0},
        {"power_kw": 0.5, "oil_temp_c": -1.0, "vibration_mm_s": 2.0},  # rotor_rpm absent
        {"rotor_rpm": 1.0, "power_kw": None, "vibration_mm_s": 0.0},  # null and absent
    ]
    by_points = post(client, f"/v1/models/nacelle/{endpoint}", {"points": rows_for(fmt, X)}, fmt)
    by_records = post(client, f"/v1/models/nacelle/{endpoint}", {"records": records}, fmt)
    assert by_records.status_code == 200, by_records.text
    assert body_of(by_records) == body_of(by_points) or _same_with_nan(
        body_of(by_records), body_of(by_points))


def _same_with_nan(a: dict[str, Any], b: dict[str, Any]) -> bool:
    """MessagePack carries NaN, which is never equal to itself."""
    assert a.keys() == b.keys()
    for key in a:
        if isinstance(a[key], list) and key != "feature_names":
            np.testing.assert_array_equal(unpacked(a[key]), unpacked(b[key]))
        else:
            assert a[key] == b[key]
    return True


def test_bad_records_answer_their_exact_problem_and_change_nothing(client: Any) -> None:
    mixture = Mixture([1.0], [[0.0, 0.0]], [1.0], "spherical")
    post(client, "/v1/models/named/versions",
         mixture_body(mixture, feature_names=["power_kw", "oil_temp_c"]))
    post(client, "/v1/models/unnamed/versions", mixture_body(mixture))
    before = [client.get(f"/v1/models/{m}").json() for m in ("named", "unnamed")]
    cases = [
        ("named", {"records": [{"power_kw": 1.0}, {"power_kw": 1.0, "oil_tmp_c": 2.0}]},
         "records[1]", "has unknown feature 'oil_tmp_c'; did you mean 'oil_temp_c'? the "
                       "model's features are: power_kw, oil_temp_c"),
        ("named", {"records": [{"wind": 1.0}]},
         "records[0]", "has unknown feature 'wind'; the model's features are: power_kw, "
                       "oil_temp_c"),
        ("unnamed", {"records": [{"x0": 1.0}]},
         "records", "model 'unnamed' has no feature names on this version; send points (rows "
                    "in feature order), or give the version feature_names"),
        ("named", {"records": []}, "records", "must be a non-empty list of objects"),
        ("named", {"points": [[1.0, 2.0]], "records": [{"power_kw": 1.0}]},
         "points", "give points (rows in the model's feature order) or records (objects keyed "
                   "by feature name), one of the two"),
        ("named", {}, "points", "give points (rows in the model's feature order) or records "
                                "(objects keyed by feature name), one of the two"),
    ]
    for model, body, field, message in cases:
        for endpoint in ("log-density", "explanations"):
            answer = post(client, f"/v1/models/{model}/{endpoint}", body)
            assert answer.status_code == 422, (body, answer.text)
            assert answer.json()["errors"] == [{"field": field, "message": message}], body
    infinite = post(client, "/v1/models/named/log-density",
                    {"records": [{"power_kw": float("inf")}]}, "msgpack")
    assert infinite.status_code == 422
    assert body_of(infinite)["errors"][0]["field"] == "records[0].power_kw"
    not_objects = post(client, "/v1/models/named/log-density", {"records": [[1.0, 2.0]]})
    assert not_objects.status_code == 422
    assert not_objects.json()["errors"][0]["field"] == "records[0]"
    assert [client.get(f"/v1/models/{m}").json() for m in ("named", "unnamed")] == before


def test_explanations_of_a_point_with_no_observed_feature_are_refused(client: Any) -> None:
    post(client, "/v1/models/m/versions",
         mixture_body(Mixture([1.0], [[0.0, 0.0]], [1.0], "spherical")))
    answer = post(client, "/v1/models/m/explanations", {"points": [[1.0, 2.0], [None, None]]})
    assert answer.status_code == 422
    assert "no observed feature" in answer.json()["detail"]
