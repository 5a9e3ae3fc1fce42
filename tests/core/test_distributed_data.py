"""Training data in parts: summaries merged in part order equal the one-pass summary
(the reservoir exactly: the same rows; the moments to rounding, against numpy's own
mean and variance), and a fit from DistributedData equals the fit of the same rows in
memory. The parts here run in this process; tests/service/test_distributed.py runs
them on a real Dask cluster."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from core import (
    DistributedData,
    Expectation,
    Statistics,
    Summary,
    fit,
    merge_parts,
    part_statistics,
    select,
    summarise_part,
    summed,
)
from core._data import RESERVOIR_ROWS, as_source, summarise

from .helpers import random_mixture


class InProcessParts(DistributedData):
    """Parts of an array, each run through the core's per-part functions."""

    def __init__(self, X: np.ndarray, cuts: Sequence[int]) -> None:
        self.parts = np.split(X, list(cuts))
        self.passes = 0

    def summary(self, seed: int) -> Summary:
        offsets = np.cumsum([0, *(len(part) for part in self.parts)])[:-1]
        return merge_parts(summarise_part(as_source(part), seed, int(offset))
                           for part, offset in zip(self.parts, offsets, strict=True))

    def statistics(self, expectations: Sequence[Expectation]) -> list[Statistics]:
        self.passes += 1
        return summed(part_statistics(expectations, as_source(part)) for part in self.parts
                      if len(part))


@settings(max_examples=25, deadline=None)
@given(st.lists(st.integers(0, 3_000), max_size=5), st.integers(0, 2**32))
def test_merged_parts_summarise_as_one_pass(cuts: list[int], seed: int) -> None:
    rng = np.random.default_rng(seed)
    X = rng.normal(3.0, 2.0, (3_000, 3))
    whole = summarise(as_source(X), seed)
    parts = InProcessParts(X, sorted(cuts)).summary(seed)
    np.testing.assert_array_equal(parts.sample, whole.sample)
    np.testing.assert_array_equal(parts.sample_keys, whole.sample_keys)
    assert parts.rows == whole.rows == 3_000
    # Reference: numpy's mean, population standard deviation and extremes of the rows.
    np.testing.assert_allclose(parts.mean, X.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(parts.scale, X.std(axis=0), rtol=1e-12)
    np.testing.assert_array_equal(parts.high, X.max(axis=0))
    np.testing.assert_array_equal(parts.low_row, X.argmin(axis=0))


def test_a_reservoir_over_parts_keeps_the_rows_of_smallest_keys() -> None:
    """More rows than the reservoir holds: the same sample from 7 uneven parts."""
    X = np.random.default_rng(4).normal(size=(RESERVOIR_ROWS * 2 + 123, 2))
    cuts = [1, 40_000, 40_001, 70_000, 100_000, 131_000]
    whole = summarise(as_source(X), 8)
    parts = InProcessParts(X, cuts).summary(8)
    assert len(parts.sample) == RESERVOIR_ROWS
    np.testing.assert_array_equal(parts.sample, whole.sample)


@pytest.mark.parametrize("structure", ["full", "diagonal", "shared"])
def test_a_fit_from_parts_is_the_fit_in_memory(structure: str) -> None:
    rng = np.random.default_rng(12)
    truth = random_mixture(rng, structure, 3, 4)
    X, _ = truth.sample(5_000, seed=13)
    data = InProcessParts(X, [700, 701, 2_900])
    found = fit(data, components=3, structure=structure, seed=2, restarts=3)
    expected = fit(X, components=3, structure=structure, seed=2, restarts=3)
    np.testing.assert_allclose(found.mixture.means, expected.mixture.means, rtol=1e-9)
    np.testing.assert_allclose(found.mixture.covariances, expected.mixture.covariances,
                               rtol=1e-9)
    assert data.passes == max(report.iterations for report in found.restarts)


def test_a_selection_from_parts_is_the_selection_in_memory() -> None:
    X, _ = random_mixture(np.random.default_rng(3), "full", 2, 2).sample(2_000, seed=4)
    data = InProcessParts(X, [1_000])
    selection = select(data, components=[1, 2], seed=5, restarts=2)
    expected = select(X, components=[1, 2], seed=5, restarts=2)
    assert [row.bic for row in selection.table] == pytest.approx(
        [row.bic for row in expected.table], rel=1e-12)
    with pytest.raises(ValueError, match="weights go with an array"):
        fit(data, components=1, weights=np.ones(2_000))
