"""One example request and answer per operation, for /docs and the OpenAPI document.

They tell one story on the two-feature ``gearbox`` model of the README: import it, read
it, score with it, upload a dataset, fit, promote. ``tests/service/test_docs.py`` sends
every request to a real app in this order and compares the answers, so they stay true.
Ids and times differ per run; the test compares those by shape only.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

JOB_ID = "95970de6d55914040709a18f"
DATASET_ID = "5be1a0c7e2f94d1bb1f0a6c3"
TIME = "2026-12-03T09:15:02.311Z"

GEARBOX = {"structure": "full", "feature_names": ["power_kw", "oil_temp_c"],
           "weights": [0.6, 0.4], "means": [[400, 45], [1800, 62]],
           "covariances": [[[9000, 150], [150, 6]], [[40000, 300], [300, 9]]]}
ROWS = [[410.0, 44.8], [1790.0, 61.5], [395.0, 45.3], [1820.0, 62.4], [420.0, 45.1],
        [1760.0, 61.2]]


@dataclass(frozen=True)
class Example:
    """``path``: the operation's path with its parameters filled in."""

    path: str
    request: dict[str, Any] | None = None
    answer: Any = None


JOB = {"id": JOB_ID, "model": "gearbox", "state": "queued", "attempts": 0,
       "created_at": TIME, "started_at": None, "finished_at": None, "progress": None,
       "rows_read": None, "rows_skipped": None, "version": None, "problem": None}
DATASET = {"id": DATASET_ID, "dimension": 2, "feature_names": ["power_kw", "oil_temp_c"],
           "rows": 0, "bytes": 0, "chunks": 0, "created_at": TIME, "expires_in_s": 86400}

#: By (method, path template), in the order the test sends them.
EXAMPLES: dict[tuple[str, str], Example] = {
    ("get", "/healthz"): Example("/healthz", answer={"status": "ok", "detail": ""}),
    ("get", "/readyz"): Example("/readyz", answer={"status": "ok", "detail": ""}),
    ("post", "/v1/models/{name}/versions"): Example(
        "/v1/models/gearbox/versions", GEARBOX,
        {"model": "gearbox", "version": 1, "serving": True}),
    ("get", "/v1/models"): Example("/v1/models", answer={"models": [
        {"name": "gearbox", "dimension": 2, "serving_version": 1, "latest_version": 1,
         "updated_at": TIME}]}),
    ("get", "/v1/models/{name}"): Example("/v1/models/gearbox", answer={
        "name": "gearbox", "dimension": 2, "serving_version": 1, "latest_version": 1,
        "created_at": TIME, "updated_at": TIME, "versions": [
            {"version": 1, "structure": "full", "components": 2, "serving": True,
             "source": "import", "created_at": TIME}]}),
    ("get", "/v1/models/{name}/versions/{version}"): Example(
        "/v1/models/gearbox/versions/1", answer={
            "model": "gearbox", "version": 1, "serving": True, "source": "import",
            "created_at": TIME, "parameters": GEARBOX,
            "tail_fraction_available": False, "training_sample_rows": 0, "fit_report": None,
            "provenance": {"source": "import"}}),
    ("post", "/v1/models/{name}/log-density"): Example(
        "/v1/models/gearbox/log-density", {"points": [[420, 46], [1750, 80], [None, 61]]},
        {"model": "gearbox", "version": 1,
         "log_density": [-7.613288, -34.048923, -2.989397], "tail_fraction": None}),
    ("post", "/v1/models/{name}/responsibilities"): Example(
        "/v1/models/gearbox/responsibilities", {"points": [[420, 46], [1750, 61]]},
        {"model": "gearbox", "version": 1, "responsibilities": [[1.0, 0.0], [0.0, 1.0]],
         "labels": [0, 1]}),
    ("post", "/v1/models/{name}/conditional"): Example(
        "/v1/models/gearbox/conditional", {"points": [[1700, None]]},
        {"model": "gearbox", "version": 1, "points": [[1700.0, 61.25]]}),
    ("post", "/v1/models/{name}/explanations"): Example(
        "/v1/models/gearbox/explanations",
        {"records": [{"power_kw": 1750, "oil_temp_c": 80}, {"oil_temp_c": 46, "power_kw": 420},
                     {"oil_temp_c": 61}]},
        {"model": "gearbox", "version": 1, "feature_names": ["power_kw", "oil_temp_c"],
         "conditional_log_density": [[-13.115082, -26.884126], [-5.204312, -1.608812],
                                     [None, -2.989397]],
         "conditional_tail": [[0.000174887, 1.52122e-12], [0.944984, 0.72158],
                              [None, 0.504447]],
         "conditional_mean": [[2400.0, 61.625], [425.000332, 45.333333], [None, 51.8]],
         "conditional_sd": [[173.205081, 2.598076], [72.458877, 1.870829], [None, 8.749857]],
         "most_unusual": [1, 1, 1]}),
    ("post", "/v1/models/{name}/samples"): Example(
        "/v1/models/gearbox/samples", {"count": 2, "seed": 7},
        {"model": "gearbox", "version": 1, "seed": 7,
         "points": [[1745.172429, 59.274968], [1709.065843, 58.74162]], "components": [1, 1]}),
    ("post", "/v1/datasets"): Example(
        "/v1/datasets", {"dimension": 2, "feature_names": ["power_kw", "oil_temp_c"]},
        DATASET),
    ("post", "/v1/datasets/{dataset_id}/chunks"): Example(
        f"/v1/datasets/{DATASET_ID}/chunks", {"points": ROWS},
        {**DATASET, "rows": 6, "bytes": 96, "chunks": 1}),
    ("get", "/v1/datasets/{dataset_id}"): Example(
        f"/v1/datasets/{DATASET_ID}", answer={**DATASET, "rows": 6, "bytes": 96, "chunks": 1}),
    ("post", "/v1/models/{name}/fits"): Example(
        "/v1/models/gearbox/fits", {"dataset": DATASET_ID, "components": {"min": 1, "max": 2},
                                    "structure": ["full", "diagonal"], "seed": 7}, JOB),
    ("get", "/v1/jobs/{job_id}"): Example(f"/v1/jobs/{JOB_ID}", answer=JOB),
    ("get", "/v1/jobs"): Example("/v1/jobs?model=gearbox", answer={"jobs": [JOB]}),
    ("delete", "/v1/jobs/{job_id}"): Example(f"/v1/jobs/{JOB_ID}", answer={
        **JOB, "state": "cancelled", "finished_at": TIME}),
    ("delete", "/v1/datasets/{dataset_id}"): Example(
        f"/v1/datasets/{DATASET_ID}", answer={**DATASET, "rows": 6, "bytes": 96, "chunks": 1}),
    ("put", "/v1/models/{name}/serving"): Example(
        "/v1/models/gearbox/serving", {"version": 2},
        {"model": "gearbox", "serving_version": 2, "previous_version": 1}),
    ("delete", "/v1/models/{name}/versions/{version}"): Example(
        "/v1/models/gearbox/versions/1", answer={"model": "gearbox", "version": 1}),
    ("get", "/v1/models/{name}/versions/{version}/report"): Example(
        "/v1/models/gearbox/versions/2/report?x=power_kw&y=oil_temp_c",
        answer="<!DOCTYPE html>..."),
    ("get", "/metrics"): Example("/metrics", answer=(
        "# HELP mixscore_points_scored_total Points scored, by model and endpoint.\n"
        "# TYPE mixscore_points_scored_total counter\n"
        'mixscore_points_scored_total{endpoint="log-density",model="gearbox"} 3.0\n...')),
    ("get", "/openapi.json"): Example("/openapi.json", answer={"openapi": "3.1.0"}),
    ("get", "/docs"): Example("/docs", answer="<!DOCTYPE html>..."),
}
