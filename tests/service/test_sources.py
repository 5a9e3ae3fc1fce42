"""service.sources on files written here: Parquet (several files and row groups), CSV
and Arrow (file and stream), the roots and the tricks that would leave them, and a fit
that streams a source equal to core.fit on the same rows in memory."""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.csv
import pyarrow.ipc
import pyarrow.parquet
import pytest
from litestar.testing import TestClient

from core import Mixture, fit
from service.app import create_app
from service.embedded import EmbeddedRedis
from service.settings import Settings
from service.sources import SourceError, SourceForbidden, checked_uri, open_source

from .servers import worker_process

TRUTH = Mixture([0.5, 0.5], [[0.0, 0.0, 0.0], [5.0, 2.0, -3.0]], [1.0, 2.0], "spherical")
NAMES = ["power_kw", "oil_temp_c", "vibration_mm_s"]


def table(X: np.ndarray) -> pa.Table:
    columns = {name: X[:, j] for j, name in enumerate(NAMES)}
    return pa.table({"turbine": [f"t{i % 12}" for i in range(len(X))], **columns})


def parquet_folder(folder: Path, X: np.ndarray, files: int = 3) -> Path:
    folder.mkdir()
    for index, part in enumerate(np.array_split(X, files)):
        pyarrow.parquet.write_table(table(part), folder / f"part-{index}.parquet",
                                    row_group_size=len(part) // 2 + 1)
    return folder


def read_all(source: object) -> np.ndarray:
    return np.concatenate(list(source))  # type: ignore[call-overload]


def test_a_parquet_folder_streams_by_row_group_in_file_order(tmp_path: Path) -> None:
    X, _ = TRUTH.sample(3_000, seed=1)
    folder = parquet_folder(tmp_path / "lake", X)
    (folder / "_SUCCESS").write_text("")  # a marker left by the writing job
    source = open_source(str(folder), None, None, [str(tmp_path)])
    assert source.format == "parquet" and source.columns == NAMES  # numeric, in file order
    assert pyarrow.parquet.ParquetFile(folder / "part-0.parquet").num_row_groups == 2
    batches = list(source)
    assert len(batches) == 6  # 3 files x 2 row groups: one batch in memory at a time
    np.testing.assert_array_equal(np.concatenate(batches), X)
    assert (source.rows_read, source.rows_skipped) == (3_000, 0)
    picked = open_source(str(folder / "*.parquet"), None, ["vibration_mm_s", "power_kw"],
                         [str(tmp_path)])
    np.testing.assert_array_equal(read_all(picked), X[:, [2, 0]])


def test_the_fingerprint_follows_the_files_not_their_bytes(tmp_path: Path) -> None:
    X, _ = TRUTH.sample(600, seed=2)
    folder = parquet_folder(tmp_path / "lake", X)
    first = open_source(str(folder), None, None, [str(tmp_path)]).fingerprint
    assert open_source(str(folder), None, None, [str(tmp_path)]).fingerprint == first
    os.utime(folder / "part-1.parquet", (1, 1))
    assert open_source(str(folder), None, None, [str(tmp_path)]).fingerprint != first


def test_csv_and_arrow_rows_with_a_missing_value_are_skipped_and_counted(
        tmp_path: Path) -> None:
    X, _ = TRUTH.sample(500, seed=3)
    gappy = X.copy()
    gappy[[4, 90, 91], 1] = np.nan
    pyarrow.csv.write_csv(table(gappy), tmp_path / "day.csv")
    with pa.OSFile(str(tmp_path / "day.arrow"), "wb") as sink, \
            pyarrow.ipc.new_file(sink, table(gappy).schema) as writer:
        for part in np.array_split(gappy, 4):
            writer.write_table(table(part))
    with pa.OSFile(str(tmp_path / "day.stream"), "wb") as sink, \
            pyarrow.ipc.new_stream(sink, table(gappy).schema) as writer:
        writer.write_table(table(gappy))
    complete = np.delete(X, [4, 90, 91], axis=0)
    for name, kind in (("day.csv", None), ("day.arrow", None), ("day.stream", "arrow")):
        source = open_source(str(tmp_path / name), kind, NAMES, [str(tmp_path)])
        np.testing.assert_allclose(read_all(source), complete, rtol=1e-15)
        assert (source.rows_read, source.rows_skipped) == (500, 3), name


def test_a_fit_streaming_a_source_equals_the_fit_in_memory(tmp_path: Path) -> None:
    X, _ = TRUTH.sample(4_000, seed=4)
    source = open_source(str(parquet_folder(tmp_path / "lake", X)), None, None,
                         [str(tmp_path)])
    streamed = fit(source, components=2, structure="spherical", seed=5, restarts=2)
    direct = fit(X, components=2, structure="spherical", seed=5, restarts=2)
    np.testing.assert_allclose(streamed.mixture.means, direct.mixture.means, rtol=1e-9)
    assert streamed.log_likelihood == pytest.approx(direct.log_likelihood, rel=1e-9)


def test_bad_sources_say_what_is_wrong(tmp_path: Path) -> None:
    X, _ = TRUTH.sample(50, seed=6)
    folder = parquet_folder(tmp_path / "lake", X, files=1)
    roots = [str(tmp_path)]
    cases = [
        (str(folder), None, ["power_kw", "rotor_rpm"], "column 'rotor_rpm' is not in"),
        (str(folder), None, ["turbine"], "column 'turbine' of"),
        (str(tmp_path / "nothing-here.parquet"), None, None, "names no file"),
        (str(tmp_path / "lake" / "part-0.parquet"), "excel", None, "format 'excel'"),
        (str(tmp_path / "data.bin"), None, None, "does not follow from its extension"),
    ]
    (tmp_path / "data.bin").write_bytes(b"\x00")
    for uri, kind, columns, message in cases:
        with pytest.raises(SourceError, match=message):
            open_source(uri, kind, columns, roots)
    (tmp_path / "fake.parquet").write_text("not parquet")
    with pytest.raises(SourceError, match="not a parquet file"):
        open_source(str(tmp_path / "fake.parquet"), None, None, roots)


def test_sources_outside_the_roots_are_refused(tmp_path: Path) -> None:
    root = tmp_path / "lake"
    X, _ = TRUTH.sample(50, seed=7)
    parquet_folder(root, X, files=1)
    outside = tmp_path / "private.parquet"
    pyarrow.parquet.write_table(table(X), outside)
    (root / "escape.parquet").symlink_to(outside)
    roots = [str(root)]
    tricks = {
        str(outside): r"is not under the roots this service may read \(MIXSCORE_SOURCE_ROOTS\)",
        f"{root}/../private.parquet": "has a '..' segment",
        f"{root}/..%2fprivate.parquet": "has an encoded",
        f"{root}%2F..%2Fprivate.parquet": "has an encoded",
        f"{root}/%2e%2e/private.parquet": "has an encoded",
        f"{root}-other/part-0.parquet": "is not under",  # a sibling sharing the prefix
        "lake/part-0.parquet": "is not under",  # relative: resolved against nothing
        f"file://{root}/part-0.parquet": "write local files as plain absolute paths",
        str(root / "escape.parquet"): "is not under",  # a symlink out of the root
        f"simplecache::{root}/part-0.parquet": "chains filesystems",
        f"{root}/part-0.parquet::memory://x": "chains filesystems",
    }
    for uri, message in tricks.items():
        with pytest.raises(SourceForbidden, match=message) as refused:
            open_source(uri, None, None, roots)
        assert str(root) not in str(refused.value).replace(uri, "")  # roots are not echoed
    with pytest.raises(SourceForbidden, match="MIXSCORE_SOURCE_ROOTS names no root"):
        checked_uri(str(root), [])
    assert len(read_all(open_source(str(root / "part-0.parquet"), None, None, roots))) == 50


def test_a_file_swapped_for_a_symlink_after_the_check_is_not_read(tmp_path: Path) -> None:
    """The path checked is the path opened: a file or a folder of the source replaced by a
    symlink out of the roots between the check (open_source) and the read is refused
    when it is opened, not followed."""
    root, outside = tmp_path / "lake", tmp_path / "private"
    X, _ = TRUTH.sample(50, seed=7)
    root.mkdir()
    parquet_folder(root / "turbines", X, files=1)
    parquet_folder(outside, X + 100.0, files=1)
    roots = [str(root)]
    for swapped in ("file", "folder"):
        source = open_source(str(root / "turbines"), None, None, roots)
        target = root / "turbines" / "part-0.parquet" if swapped == "file" else root / "turbines"
        aside = target.with_name(target.name + ".aside")
        target.rename(aside)
        target.symlink_to(outside / "part-0.parquet" if swapped == "file" else outside)
        try:
            with pytest.raises(SourceError, match=r"part-0\.parquet") as refused:
                read_all(source)
            if swapped == "folder":
                assert isinstance(refused.value, SourceForbidden)
                assert "now leads outside the roots" in str(refused.value)
        finally:
            target.unlink()
            aside.rename(target)
        assert len(read_all(open_source(str(root / "turbines"), None, None, roots))) == 50


def test_fsspec_urls_under_a_url_root(tmp_path: Path) -> None:
    """The fsspec path with its in-memory filesystem (no object store is installable
    here): a URL root admits URLs under it only."""
    import fsspec

    memory = fsspec.filesystem("memory")
    X, _ = TRUTH.sample(300, seed=8)
    with memory.open("/lake/turbines/a.parquet", "wb") as handle:
        pyarrow.parquet.write_table(table(X), handle, row_group_size=100)
    roots = ["memory://lake/turbines"]
    source = open_source("memory://lake/turbines/*.parquet", None, NAMES, roots)
    np.testing.assert_array_equal(read_all(source), X)
    with pytest.raises(SourceForbidden, match="is not under"):
        open_source("memory://lake/other/a.parquet", None, None, roots)
    with pytest.raises(SourceForbidden, match="is not under"):
        open_source(str(tmp_path), None, None, roots)  # a local path under a URL root


@pytest.fixture
def api(redis_server: EmbeddedRedis, key_prefix: str, tmp_path: Path) -> Iterator[Any]:
    settings = Settings.from_env({}, redis_url=redis_server.url, key_prefix=key_prefix,
                                 source_roots=f"{tmp_path / 'lake'},memory://lake")
    with TestClient(create_app(settings)) as client:
        yield client


def run_jobs(redis_server: EmbeddedRedis, key_prefix: str, root: Path) -> None:
    with worker_process(redis_server.url, key_prefix, until_empty=True,
                        MIXSCORE_SOURCE_ROOTS=str(root)) as worker:
        assert worker.wait(120) == 0


def test_a_fit_from_a_parquet_folder_is_core_fit_of_its_complete_rows(
        api: Any, redis_server: EmbeddedRedis, key_prefix: str, tmp_path: Path) -> None:
    X, _ = TRUTH.sample(2_000, seed=9)
    gappy = X.copy()
    gappy[[10, 1500], 2] = np.nan
    folder = parquet_folder(tmp_path / "lake", gappy)
    job = api.post("/v1/models/lake/fits", json={
        "source": {"uri": str(folder), "columns": ["vibration_mm_s", "power_kw"]},
        "components": 2, "structure": "spherical", "seed": 4, "restarts": 2})
    assert job.status_code == 202, job.text
    run_jobs(redis_server, key_prefix, tmp_path / "lake")
    done = api.get(f"/v1/jobs/{job.json()['id']}").json()
    assert (done["state"], done["version"]) == ("succeeded", 1), done
    assert (done["rows_read"], done["rows_skipped"]) == (2_000, 2)
    version = api.get("/v1/models/lake/versions/1").json()
    complete = np.delete(X, [10, 1500], axis=0)[:, [2, 0]]
    direct = fit(complete, components=2, structure="spherical", seed=4, restarts=2)
    # Row groups sum in another order than the array's chunks: equal to rounding.
    np.testing.assert_allclose(np.array(version["parameters"]["means"]), direct.mixture.means,
                               rtol=1e-9)
    assert version["parameters"]["feature_names"] == ["vibration_mm_s", "power_kw"]
    provenance = version["provenance"]
    assert (provenance["rows"], provenance["rows_read"], provenance["rows_skipped"]) == (
        1_998, 2_000, 2)
    assert [Path(f["path"]).name for f in provenance["source"]["files"]] == [
        "part-0.parquet", "part-1.parquet", "part-2.parquet"]
    assert provenance["data_sha256"] == provenance["source"]["fingerprint"]


def test_sources_are_checked_before_queueing(api: Any, tmp_path: Path) -> None:
    root = tmp_path / "lake"
    forbidden = [str(tmp_path / "other.parquet"), f"{root}/../other.parquet",
                 f"{root}/%2e%2e/other.parquet", f"{root}-b/x.parquet", "memory://elsewhere/x.csv"]
    for uri in forbidden:
        answer = api.post("/v1/models/m/fits", json={"source": {"uri": uri}})
        assert answer.status_code == 403, (uri, answer.text)
        assert answer.json()["type"].endswith("source-outside-roots")
    cases = [
        ({"source": {"uri": f"{root}/x.xlsx"}}, "source"),
        ({"source": {"uri": f"{root}/x.csv", "format": "excel"}}, "source.format"),
        ({"source": {"uri": f"{root}/x.csv", "columns": []}}, "source.columns"),
        ({"source": {"uri": f"{root}/x.csv"}, "points": [[1.0]]}, "source"),
        ({"source": {"uri": f"{root}/x.csv"}, "feature_names": ["a"]}, "source.columns"),
    ]
    for body, field in cases:
        answer = api.post("/v1/models/m/fits", json=body)
        assert answer.status_code == 422, (body, answer.text)
        assert answer.json()["errors"][0]["field"] == field, (body, answer.text)


def test_a_source_the_worker_cannot_use_fails_its_job_saying_why(
        api: Any, redis_server: EmbeddedRedis, key_prefix: str, tmp_path: Path) -> None:
    X, _ = TRUTH.sample(100, seed=10)
    folder = parquet_folder(tmp_path / "lake", X, files=1)
    api.post("/v1/models/narrow/versions", json={
        "structure": "spherical", "weights": [1.0], "means": [[0.0, 0.0]], "covariances": [1.0]})
    jobs = {
        "column 'rotor_rpm' is not in": {"uri": str(folder), "columns": ["rotor_rpm"]},
        "names no file": {"uri": f"{folder}/missing.parquet"},
    }
    ids = {message: api.post("/v1/models/m/fits", json={"source": source}).json()["id"]
           for message, source in jobs.items()}
    mismatch = api.post("/v1/models/narrow/fits", json={"source": {"uri": str(folder)}})
    run_jobs(redis_server, key_prefix, tmp_path / "lake")
    for message, job in ids.items():
        problem = api.get(f"/v1/jobs/{job}").json()["problem"]
        assert problem["status"] == 422 and message in problem["detail"], problem
    problem = api.get(f"/v1/jobs/{mismatch.json()['id']}").json()["problem"]
    assert problem["status"] == 409 and "has dimension 2; the source has 3" in problem["detail"]


def test_reading_holds_one_row_group_whatever_the_file(tmp_path: Path) -> None:
    """The bound: a batch (one row group, one CSV block, one Arrow record batch), as
    pyarrow's allocator counts it, plus its float64 copy; not the file."""
    X, _ = TRUTH.sample(200_000, seed=11)
    path = tmp_path / "lake" / "big.parquet"
    path.parent.mkdir()
    pyarrow.parquet.write_table(table(X), path, row_group_size=20_000)  # 10 groups
    source = open_source(str(path), None, NAMES, [str(tmp_path / "lake")])
    group_bytes = 20_000 * len(NAMES) * 8
    before = pa.total_allocated_bytes()
    peak = 0
    for batch in source:
        peak = max(peak, pa.total_allocated_bytes() - before + batch.nbytes)
    assert source.rows_read == 200_000
    assert peak < 3 * group_bytes < X.nbytes / 3


def test_a_file_gone_after_the_source_was_opened_is_a_source_error(tmp_path: Path) -> None:
    X, _ = TRUTH.sample(100, seed=12)
    folder = parquet_folder(tmp_path / "lake", X, files=2)
    source = open_source(str(folder), None, None, [str(tmp_path)])
    (folder / "part-1.parquet").unlink()
    with pytest.raises(SourceError, match=r"reading .*part-1\.parquet failed"):
        read_all(source)
