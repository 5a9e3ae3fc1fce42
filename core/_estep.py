"""The E-step as additive block statistics: what a pass of EM learns from its rows.

``Expectation`` holds one parameter state, compiled once per pass; ``block`` turns a
block of rows into ``Statistics`` (log-likelihood, responsibility counts, first and
second moments about a fixed centre) and touches nothing else, so blocks may be
processed in any grouping, on any thread or machine, and their statistics added.
``expected_statistics`` runs a whole source through it on ``LANES`` threads and sums
in a fixed order, so a fit is reproducible for a given seed. It takes several states
at once, so that the restarts of a fit share one read of the source per iteration.

``DistributedData`` is training data whose passes run elsewhere (on the machines that
hold its parts): ``fit`` asks it for the summary and for each pass's statistics, and
``part_statistics`` and ``_data.summarise_part`` are what it runs on each part, and
``summed`` adds up the parts' results.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Iterable, Iterator, Sequence
from concurrent.futures import Future
from dataclasses import dataclass

import numpy as np

from ._covariance import Covariance
from ._data import Chunk, Summary
from ._kernels import Kernel
from ._scoring import CHUNK_ROWS, THREADS, UNDERFLOW, log_constants, thread_pool
from ._validation import FloatArray

#: Rows per block: the kernel runs over sub-blocks of CHUNK_ROWS (its buffer stays in
#: cache), the moments over the whole block (a longer GEMM is faster; bench_core.py).
BLOCK_ROWS = 4096
#: Threads a pass runs on (of the pool scoring uses too). More BLAS threads only
#: compete with these (README, Performance).
LANES = THREADS


@dataclass(frozen=True)
class Statistics:
    """Sufficient statistics of some rows under one state, in its frame (the
    log-likelihood too); ``a + b`` covers both."""

    log_likelihood: float
    counts: FloatArray  # (k,) summed responsibilities
    sums: FloatArray  # (k, d) responsibility-weighted rows, about the centre
    second: FloatArray  # the structure's additive second moments (Covariance)

    def __add__(self, other: Statistics) -> Statistics:
        return Statistics(self.log_likelihood + other.log_likelihood,
                          self.counts + other.counts, self.sums + other.sums,
                          self.second + other.second)


class Expectation:
    """One state's E-step: weights (k,), means (k, d) and covariances in the frame of
    rows centred on ``center`` and divided by ``scale`` (the fit's standardised frame)."""

    def __init__(self, weights: FloatArray, means: FloatArray, covariance: Covariance,
                 center: FloatArray, scale: FloatArray | None = None) -> None:
        self.components, self.dimension = means.shape
        self.covariance = covariance
        self.center = center
        self.inverse_scale = None if scale is None else (1.0 / scale)[:, None]
        constants = log_constants(weights, self.dimension, covariance.log_det())
        self.shift = float(constants.max())
        # Rows arrive centred on ``center``, the frame the means are kept in.
        self.kernel = covariance.kernel(means, constants, np.zeros(self.dimension), self.shift)

    def block(self, rows: FloatArray, weights: FloatArray) -> Statistics:
        """The statistics of one block of rows (at most BLOCK_ROWS) and their weights."""
        k, d = self.components, self.dimension
        m = rows.shape[0]
        augmented = np.empty((d + 1, m))
        augmented[d] = 1.0
        centered = augmented[:d]
        np.subtract(rows.T, self.center[:, None], out=centered)
        if self.inverse_scale is not None:
            centered *= self.inverse_scale
        resp = np.empty((k, m))
        work = np.empty(max(self.kernel.work_size(CHUNK_ROWS),
                            type(self.covariance).work_size(k, d, m)))
        with np.errstate(divide="ignore", invalid="ignore", under="ignore"):
            for start in range(0, m, CHUNK_ROWS):
                part = slice(start, start + CHUNK_ROWS)
                self.kernel.chunk(augmented[:, part], resp[:, part], work)
            log_likelihood = _responsibilities_in_place(self.kernel, resp, centered, weights,
                                                        self.shift)
        return Statistics(log_likelihood, resp.sum(axis=1), resp @ centered.T,
                          np.asarray(self.covariance.second_moments(resp, centered, work)))


def blocks(source: Iterable[Chunk]) -> Iterator[Chunk]:
    """The source's rows in blocks of at most BLOCK_ROWS, in order."""
    for rows, weights in source:
        for start in range(0, rows.shape[0], BLOCK_ROWS):
            yield rows[start : start + BLOCK_ROWS], weights[start : start + BLOCK_ROWS]


def expected_statistics(expectations: Sequence[Expectation], source: Iterable[Chunk]
                        ) -> list[Statistics]:
    """One pass for several states: block i runs on lane i mod LANES; each lane sums its
    blocks in order and the lanes are summed in order, so each state's result does not
    depend on thread timing, nor on the other states in the pass."""
    pool = thread_pool()
    running: list[Future[list[Statistics]] | None] = [None] * LANES
    totals: list[list[Statistics] | None] = [None] * LANES
    for i, (rows, weights) in enumerate(blocks(source)):
        lane = i % LANES
        totals[lane] = _added(totals[lane], running[lane])
        running[lane] = pool.submit(_blocks_of, expectations, rows, weights)
    for lane in range(LANES):
        totals[lane] = _added(totals[lane], running[lane])
    return summed(totals)


def summed(parts: Iterable[list[Statistics] | None]) -> list[Statistics]:
    """Each state's statistics of several parts added in the order given (None: a part
    of no rows): how lanes, and a DistributedData's parts, are added up."""
    total: list[Statistics] | None = None
    for part in parts:
        total = _plus(total, part)
    if total is None:
        raise ValueError("the training data has no rows")
    return total


def part_statistics(expectations: Sequence[Expectation], chunks: Iterable[Chunk]
                    ) -> list[Statistics] | None:
    """One part's statistics for each state, its blocks summed in order on the calling
    thread (None for a part of no rows): what a remote task runs per part."""
    total: list[Statistics] | None = None
    for rows, weights in blocks(chunks):
        total = _plus(total, _blocks_of(expectations, rows, weights))
    return total


class DistributedData(ABC):
    """Training data held in parts elsewhere; ``fit`` and ``select`` take it for X.

    An implementation runs ``_data.summarise_part`` on each part (with the part's
    first global row) and ``part_statistics`` on each part for each pass, wherever the
    parts are, and adds the results in a fixed part order: the fit is then the one an
    in-memory array of the same rows gives, up to rounding."""

    @abstractmethod
    def summary(self, seed: int) -> Summary:
        """``_data.merge_parts`` of every part's ``summarise_part``."""

    @abstractmethod
    def statistics(self, expectations: Sequence[Expectation]) -> list[Statistics]:
        """One pass: every part's ``part_statistics``, ``summed`` in part order."""


def _blocks_of(expectations: Sequence[Expectation], rows: FloatArray, weights: FloatArray
               ) -> list[Statistics]:
    return [expectation.block(rows, weights) for expectation in expectations]


def _added(total: list[Statistics] | None, running: Future[list[Statistics]] | None
           ) -> list[Statistics] | None:
    if running is None:
        return total
    return _plus(total, running.result())


def _plus(total: list[Statistics] | None, part: list[Statistics] | None
          ) -> list[Statistics] | None:
    if part is None:
        return total
    if total is None:
        return part
    return [a + b for a, b in zip(total, part, strict=True)]


def _responsibilities_in_place(
    kernel: Kernel, joint: FloatArray, centered: FloatArray, weights: FloatArray, shift: float
) -> float:
    """Turn a block's shifted log-joint (k, c) into weighted responsibilities.

    Returns the block's weighted log-likelihood.
    """
    np.exp(joint, out=joint)
    total = joint.sum(axis=0)
    log_density = np.log(total) + shift
    joint *= weights / total
    low = np.flatnonzero(total < UNDERFLOW)
    if low.size:  # far from every component: redo those rows with a per-row maximum
        row_joint = kernel.rows(centered[:, low].T)
        row_density = np.logaddexp.reduce(row_joint, axis=1)
        joint[:, low] = (np.exp(row_joint - row_density[:, None]) * weights[low, None]).T
        log_density[low] = row_density
    return float(weights @ log_density)
