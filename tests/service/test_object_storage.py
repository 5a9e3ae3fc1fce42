"""s3:// sources through fsspec against a real S3-compatible server started here (moto's
standalone server, from the registry): a folder of Parquet files fits as the same rows
in memory do (the core's in-memory fit is the reference), in-process and through a fit
job whose worker takes its endpoint and credentials from its own environment."""

from __future__ import annotations

import io
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.parquet
import pytest

s3fs = pytest.importorskip("s3fs")
pytest.importorskip("moto")

from litestar.testing import TestClient  # noqa: E402

from core import fit  # noqa: E402
from service.app import create_app  # noqa: E402
from service.embedded import EmbeddedRedis  # noqa: E402
from service.settings import Settings  # noqa: E402
from service.sources import open_source  # noqa: E402

from .servers import worker_process  # noqa: E402
from .test_sources import NAMES, TRUTH, table  # noqa: E402

ROOT = "s3://lake/turbines"


@pytest.fixture(scope="module")
def s3_server() -> Iterator[dict[str, str]]:
    """The server and the environment that points the AWS SDK at it."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    server = subprocess.Popen(
        [sys.executable, "-m", "moto.server", "-H", "127.0.0.1", "-p", str(port)],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 30
    while True:
        try:
            socket.create_connection(("127.0.0.1", port), 0.2).close()
            break
        except OSError:
            assert time.monotonic() < deadline, "the S3 server did not start"
            time.sleep(0.1)
    try:
        yield {"AWS_ENDPOINT_URL": f"http://127.0.0.1:{port}", "AWS_ACCESS_KEY_ID": "test-key",
               "AWS_SECRET_ACCESS_KEY": "test-secret", "AWS_DEFAULT_REGION": "us-east-1"}
    finally:
        server.terminate()
        server.wait(30)


@pytest.fixture
def lake(s3_server: dict[str, str], monkeypatch: pytest.MonkeyPatch) -> Iterator[Any]:
    """An empty bucket; this process's environment points at the server meanwhile."""
    for name, value in s3_server.items():
        monkeypatch.setenv(name, value)
    filesystem = s3fs.S3FileSystem(skip_instance_cache=True)
    filesystem.mkdir("lake")
    yield filesystem
    filesystem.rm("lake", recursive=True)


def upload(filesystem: Any, X: np.ndarray) -> None:
    for index, part in enumerate(np.array_split(X, 2)):
        buffer = io.BytesIO()
        pyarrow.parquet.write_table(table(part), buffer, row_group_size=len(part) // 2 + 1)
        filesystem.pipe(f"lake/turbines/part-{index}.parquet", buffer.getvalue())


def test_an_s3_folder_fits_as_its_rows_in_memory(lake: Any) -> None:
    X, _ = TRUTH.sample(1_500, seed=2)
    upload(lake, X)
    source = open_source(ROOT, None, NAMES, [ROOT])
    assert [Path(f.path).name for f in source.files] == ["part-0.parquet", "part-1.parquet"]
    assert all(f.modified for f in source.files)  # the ETag stands for the file's identity
    found = fit(source, components=2, seed=6, restarts=2)
    expected = fit(X, components=2, seed=6, restarts=2)
    np.testing.assert_allclose(found.mixture.means, expected.mixture.means, rtol=1e-9)
    assert (source.rows_read, source.rows_skipped) == (1_500, 0)


def test_a_fit_job_reads_s3_with_the_workers_own_credentials(
        lake: Any, s3_server: dict[str, str], redis_server: EmbeddedRedis,
        key_prefix: str) -> None:
    X, _ = TRUTH.sample(1_200, seed=3)
    upload(lake, X)
    settings = Settings.from_env({}, redis_url=redis_server.url, key_prefix=key_prefix,
                                 source_roots=ROOT)
    with TestClient(create_app(settings)) as api:
        outside = api.post("/v1/models/lake/fits", json={
            "source": {"uri": "s3://lake/other/"}, "components": 2})
        assert outside.status_code == 403, outside.text
        job = api.post("/v1/models/lake/fits", json={
            "source": {"uri": f"{ROOT}/", "columns": NAMES}, "components": 2, "seed": 1})
        assert job.status_code == 202, job.text
        with worker_process(redis_server.url, key_prefix, until_empty=True,
                            MIXSCORE_SOURCE_ROOTS=ROOT, **s3_server) as worker:
            assert worker.wait(120) == 0
        done = api.get(f"/v1/jobs/{job.json()['id']}").json()
        assert (done["state"], done["rows_read"]) == ("succeeded", 1_200), done
        version = api.get("/v1/models/lake/versions/1").json()
    expected = fit(X, components=2, seed=1)
    np.testing.assert_allclose(np.array(version["parameters"]["means"]),
                               expected.mixture.means, rtol=1e-9)
    files = version["provenance"]["source"]["files"]
    assert [f["path"] for f in files] == ["lake/turbines/part-0.parquet",
                                          "lake/turbines/part-1.parquet"]
