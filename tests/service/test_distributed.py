"""Source passes on a real Dask cluster (a LocalCluster of two worker processes): the
model equals core.fit on the same complete rows in memory (the reference: the core's
own in-memory fit, itself checked against scipy and a plain EM in tests/core), one
statistics pass per iteration whatever the restarts, a Dask worker killed mid-fit
(its tasks rerun), and fit jobs whose worker drives the passes on the cluster."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.csv
import pyarrow.ipc
import pyarrow.parquet
import pytest

distributed = pytest.importorskip("distributed")

import dask  # noqa: E402
from dask.utils import key_split  # noqa: E402

from core import FitProgress, fit  # noqa: E402
from service.client import Client  # noqa: E402
from service.distributed import DaskSource  # noqa: E402
from service.embedded import EmbeddedRedis  # noqa: E402
from service.sources import open_source  # noqa: E402

from .servers import api_process, worker_process  # noqa: E402
from .test_sources import NAMES, TRUTH, table  # noqa: E402
from .test_sources import api as api  # noqa: E402 (the fixture)

ROWS = 6_000
GAPS = [7, 2_500, 5_999]  # rows with a missing value: skipped and counted


@pytest.fixture(scope="module")
def cluster() -> Iterator[Any]:
    """Its nannies would set MALLOC_TRIM_THRESHOLD_ and BLAS thread counts in this
    process's environment, which every later subprocess of the suite inherits: they
    are told not to, and the environment is restored anyway."""
    saved = dict(os.environ)
    with dask.config.set({"distributed.nanny.pre-spawn-environ": {}}), \
            distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                     dashboard_address=None) as local:
        yield local
    os.environ.clear()
    os.environ.update(saved)


@pytest.fixture
def client(cluster: Any) -> Iterator[Any]:
    with distributed.Client(cluster, set_as_default=False) as connected:
        yield connected


def rows(seed: int = 9) -> np.ndarray:
    X, _ = TRUTH.sample(ROWS, seed=seed)
    X[GAPS, 1] = np.nan
    return X


def write(folder: Path, X: np.ndarray, kind: str) -> Path:
    """Three files; Parquet with two row groups each, Arrow with record batches."""
    folder.mkdir()
    for index, part in enumerate(np.array_split(X, 3)):
        path = folder / f"part-{index}.{kind}"
        if kind == "parquet":
            pyarrow.parquet.write_table(table(part), path, row_group_size=len(part) // 2 + 1)
        elif kind == "csv":
            pyarrow.csv.write_csv(table(part), path)
        else:
            with pyarrow.ipc.new_file(path, table(part).schema) as writer:
                writer.write_table(table(part), max_chunksize=700)
    return folder


def reference(X: np.ndarray, **options: Any) -> Any:
    return fit(X[~np.isnan(X).any(axis=1)], **options)


@pytest.mark.parametrize("kind", ["parquet", "csv", "arrow"])
def test_dask_passes_give_the_fit_in_memory(client: Any, tmp_path: Path, kind: str) -> None:
    X = rows()
    folder = write(tmp_path / "lake", X, kind)
    data = DaskSource(client, open_source(str(folder), None, NAMES, [str(tmp_path)]))
    assert len(data.parts) == (6 if kind == "parquet" else 3)
    options = dict(components=2, structure="full", seed=3, restarts=3)
    found = fit(data, **options)
    expected = reference(X, **options)
    np.testing.assert_allclose(found.mixture.means, expected.mixture.means, rtol=1e-9)
    np.testing.assert_allclose(found.mixture.covariances, expected.mixture.covariances,
                               rtol=1e-9)
    assert found.log_likelihood == pytest.approx(expected.log_likelihood, rel=1e-12)
    # The same reservoir rows: the keys follow the global row index, not the parts.
    np.testing.assert_array_equal(found.sample.rows, expected.sample.rows)
    # Counting, summarising, then one pass per iteration for all three restarts.
    assert data.passes == 2 + max(report.iterations for report in found.restarts)
    assert (data.source.rows_read, data.source.rows_skipped) == (ROWS, len(GAPS))


def test_a_dask_worker_killed_mid_fit_does_not_fail_it(client: Any, cluster: Any,
                                                       tmp_path: Path) -> None:
    X = rows(seed=10)
    folder = write(tmp_path / "lake", X, "parquet")
    data = DaskSource(client, open_source(str(folder), None, NAMES, [str(tmp_path)]))
    pids = client.run(os.getpid)
    killed: list[int] = []

    def kill_during_the_next_pass(progress: FitProgress) -> None:
        if progress.iteration == 2 and not killed:
            victim = next(iter(pids.values()))
            killed.append(victim)
            threading.Timer(0.02, os.kill, (victim, signal.SIGKILL)).start()

    options = dict(components=2, structure="diagonal", seed=5, restarts=2, tolerance=1e-9)
    found = fit(data, progress=kill_during_the_next_pass, **options)
    expected = reference(X, **options)
    assert killed
    np.testing.assert_allclose(found.mixture.means, expected.mixture.means, rtol=1e-9)
    client.wait_for_workers(2, timeout=60)  # the nanny brought the worker back
    assert killed[0] not in client.run(os.getpid).values()


def test_a_fit_job_runs_its_passes_on_the_cluster(
        api: Any, client: Any, cluster: Any, redis_server: EmbeddedRedis, key_prefix: str,
        tmp_path: Path) -> None:
    X = rows(seed=11)
    write(tmp_path / "lake", X, "parquet")
    job = api.post("/v1/models/lake/fits", json={
        "source": {"uri": str(tmp_path / "lake"), "columns": NAMES},
        "components": 2, "structure": "spherical", "seed": 4, "restarts": 2})
    assert job.status_code == 202, job.text
    with distributed.get_task_stream(client) as stream, worker_process(
            redis_server.url, key_prefix, until_empty=True,
            MIXSCORE_SOURCE_ROOTS=str(tmp_path / "lake"),
            MIXSCORE_DASK_SCHEDULER=cluster.scheduler_address) as worker:
        assert worker.wait(120) == 0
    done = api.get(f"/v1/jobs/{job.json()['id']}").json()
    assert (done["state"], done["rows_read"], done["rows_skipped"]) == (
        "succeeded", ROWS, len(GAPS)), done
    version = api.get("/v1/models/lake/versions/1").json()
    expected = reference(X, components=2, structure="spherical", seed=4, restarts=2)
    np.testing.assert_allclose(np.array(version["parameters"]["means"]),
                               expected.mixture.means, rtol=1e-9)
    ran = {key_split(task["key"]) for task in stream.data}
    assert {"count_rows", "summarise_rows", "pass_statistics"} <= ran, ran


def test_an_unreachable_scheduler_fails_the_job_saying_so(
        api: Any, redis_server: EmbeddedRedis, key_prefix: str, tmp_path: Path) -> None:
    write(tmp_path / "lake", rows(), "csv")
    job = api.post("/v1/models/lake/fits", json={
        "source": {"uri": str(tmp_path / "lake")}, "components": 2, "seed": 1})
    assert job.status_code == 202, job.text
    with worker_process(redis_server.url, key_prefix, until_empty=True,
                        MIXSCORE_SOURCE_ROOTS=str(tmp_path / "lake"),
                        MIXSCORE_DASK_SCHEDULER="tcp://127.0.0.1:9") as worker:
        assert worker.wait(120) == 0
    done = api.get(f"/v1/jobs/{job.json()['id']}").json()
    assert done["state"] == "failed", done
    assert done["problem"]["status"] == 503
    assert "Dask scheduler at tcp://127.0.0.1:9 cannot be reached" in done["problem"]["detail"]


def test_the_client_and_the_command_fit_sources_on_the_cluster(
        cluster: Any, redis_server: EmbeddedRedis, key_prefix: str, tmp_path: Path) -> None:
    X = rows(seed=12)
    folder = write(tmp_path / "lake", X, "csv")
    roots = {"MIXSCORE_SOURCE_ROOTS": str(folder)}
    with api_process(redis_server.url, key_prefix, **roots) as url, worker_process(
            redis_server.url, key_prefix, MIXSCORE_DASK_SCHEDULER=cluster.scheduler_address,
            **roots):
        with Client(url) as client:
            job = client.fit("by-client", source=str(folder), components=2, seed=4,
                             structure="diagonal", timeout_s=120)
        assert (job.state, job.version, job.rows_skipped) == ("succeeded", 1, len(GAPS))
        command = subprocess.run(
            [sys.executable, "-m", "service.cli", "fit", "by-command", "--source", str(folder),
             "--columns", ",".join(NAMES[::-1]), "--components", "1-2",
             "--structure", "diagonal", "--seed", "4", "--url", url],
            capture_output=True, text=True, timeout=120)
        assert command.returncode == 0, command.stderr
        printed = json.loads(command.stdout)
        assert (printed["state"], printed["version"]) == ("succeeded", 1)
        assert "iteration" in command.stderr  # progress while it runs
        with Client(url) as client:
            names = client.version("by-command", 1).parameters.feature_names
        assert names == NAMES[::-1]
        refused = subprocess.run(
            [sys.executable, "-m", "service.cli", "fit", "by-command", "--source",
             str(tmp_path), "--url", url], capture_output=True, text=True, timeout=60)
        assert refused.returncode == 1
        assert "is not under the roots this service may read (MIXSCORE_SOURCE_ROOTS)" \
            in refused.stderr
