"""Memory the service keeps is bounded, each bound a setting named in its problem:
finished jobs expire, datasets stop at a byte limit, a source of too many columns
fails its job. Real HTTP, a real redis-server and a real worker."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet
import redis
from litestar.testing import TestClient

from service.app import create_app
from service.embedded import EmbeddedRedis
from service.keys import Keys
from service.settings import Settings

from .servers import worker_process
from .test_jobs import submit, training


def app(redis_server: EmbeddedRedis, key_prefix: str, **overrides: Any) -> TestClient[Any]:
    return TestClient(create_app(Settings.from_env(
        {}, redis_url=redis_server.url, key_prefix=key_prefix, **overrides)))


def test_a_finished_job_expires_after_the_retention_time(
        redis_server: EmbeddedRedis, key_prefix: str) -> None:
    with app(redis_server, key_prefix, job_retention_s=600.0) as client:
        queued = submit(client, training(100), seed=1)
        done = submit(client, training(100), seed=2)
        cancelled = client.delete(f"/v1/jobs/{queued['id']}").json()
        assert cancelled["state"] == "cancelled"
        with worker_process(redis_server.url, key_prefix, until_empty=True,
                            MIXSCORE_JOB_RETENTION_S="600") as worker:
            assert worker.wait(60) == 0
        assert client.get(f"/v1/jobs/{done['id']}").json()["state"] == "succeeded"
    keys = Keys(key_prefix)
    with redis.Redis(port=redis_server.port) as direct:
        for job in (queued, done):
            assert 590 <= direct.ttl(keys.job(job["id"])) <= 600


def test_a_dataset_stops_at_its_byte_limit(redis_server: EmbeddedRedis,
                                           key_prefix: str) -> None:
    with app(redis_server, key_prefix, dataset_max_bytes=4_000) as client:
        dataset = client.post("/v1/datasets", json={"dimension": 2}).json()
        chunk = {"points": np.ones((200, 2)).tolist()}  # 3 200 bytes
        assert client.post(f"/v1/datasets/{dataset['id']}/chunks", json=chunk
                           ).status_code == 200
        over = client.post(f"/v1/datasets/{dataset['id']}/chunks", json=chunk)
        assert over.status_code == 413
        assert over.json()["detail"] == (
            "the dataset holds 3200 bytes; this chunk's 3200 would pass the limit of 4000 "
            "bytes a dataset (MIXSCORE_DATASET_MAX_BYTES)")
        kept = client.get(f"/v1/datasets/{dataset['id']}").json()
        assert (kept["rows"], kept["bytes"]) == (200, 3_200)


def test_a_source_of_more_columns_than_the_limit_fails_its_job(
        redis_server: EmbeddedRedis, key_prefix: str, tmp_path: Path) -> None:
    wide = {f"sensor_{j}": np.arange(50.0) * (j + 1) % 7 for j in range(5)}
    pyarrow.parquet.write_table(pa.table(wide), tmp_path / "wide.parquet")
    limits = {"max_dimension": 4, "source_roots": str(tmp_path)}
    with app(redis_server, key_prefix, **limits) as client:
        named = client.post("/v1/models/wide/fits", json={
            "source": {"uri": str(tmp_path / "wide.parquet"), "columns": list(wide)}})
        assert named.status_code == 413
        assert named.json()["detail"] == ("dimension 5 exceeds the limit of 4 "
                                          "(MIXSCORE_MAX_DIMENSION)")
        job = client.post("/v1/models/wide/fits", json={
            "source": {"uri": str(tmp_path / "wide.parquet")}, "components": 2})
        assert job.status_code == 202, job.text
        with worker_process(redis_server.url, key_prefix, until_empty=True,
                            MIXSCORE_MAX_DIMENSION="4",
                            MIXSCORE_SOURCE_ROOTS=str(tmp_path)) as worker:
            assert worker.wait(60) == 0
        failed = client.get(f"/v1/jobs/{job.json()['id']}").json()
        assert (failed["state"], failed["problem"]["status"]) == ("failed", 413)
        assert failed["problem"]["detail"] == ("dimension 5 exceeds the limit of 4 "
                                               "(MIXSCORE_MAX_DIMENSION)")
