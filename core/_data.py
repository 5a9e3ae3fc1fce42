"""Training data as re-iterable chunks, and the one pass that summarises it.

``fit`` accepts an array or any re-iterable source of chunks (each an array of
rows, or a pair of rows and per-row weights). Every EM iteration is one pass,
so memory is bounded by the chunk size, the model size and the fixed-size
reservoir sample kept here, never by the number of rows.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._validation import FloatArray, as_float_array

#: Rows per chunk when fitting an in-memory array.
ARRAY_CHUNK_ROWS = 4096
#: Uniform sample of training rows kept for initialisation and training quantiles.
RESERVOIR_ROWS = 65_536

Chunk = tuple[FloatArray, FloatArray]


class ChunkSource:
    """Re-iterable (rows, weights) chunks with checked shapes and values."""

    def __init__(self, chunks: Iterable[Any], dimension: int | None) -> None:
        self._chunks = chunks
        self.dimension = dimension

    def __iter__(self) -> Iterator[Chunk]:
        for index, item in enumerate(self._chunks):
            rows, weights = _split(item, index)
            if self.dimension is None:
                self.dimension = rows.shape[1]
            if rows.shape[1] != self.dimension:
                raise ValueError(
                    f"chunk {index} has {rows.shape[1]} columns; earlier chunks had "
                    f"{self.dimension}"
                )
            if rows.shape[0]:
                yield rows, weights


def as_source(data: Any, weights: Any = None) -> ChunkSource:
    """An array (with optional weights) or a re-iterable of chunks, as a ChunkSource."""
    if isinstance(data, np.ndarray) or (isinstance(data, list | tuple) and _looks_tabular(data)):
        X = as_float_array(data, "X")
        if X.ndim != 2 or X.shape[1] == 0:
            raise ValueError(f"X must be 2-D (n, d) with d >= 1; got shape {X.shape}")
        w = np.ones(X.shape[0]) if weights is None else as_float_array(weights, "weights")
        if w.shape != (X.shape[0],):
            raise ValueError(f"weights must have shape ({X.shape[0]},); got {w.shape}")
        chunks = [
            (X[start : start + ARRAY_CHUNK_ROWS], w[start : start + ARRAY_CHUNK_ROWS])
            for start in range(0, X.shape[0], ARRAY_CHUNK_ROWS)
        ]
        return ChunkSource(chunks, X.shape[1])
    if weights is not None:
        raise ValueError("weights go with an array; a chunk source yields (rows, weights) pairs")
    if not isinstance(data, Iterable):
        raise ValueError(f"X must be an array or a re-iterable source of chunks; got {data!r}")
    if iter(data) is data:
        raise ValueError(
            "X is a one-shot iterator; fitting needs one pass per iteration, so pass a "
            "re-iterable source (an object whose __iter__ starts a new pass)"
        )
    return ChunkSource(data, None)


def _looks_tabular(data: list[Any] | tuple[Any, ...]) -> bool:
    return len(data) == 0 or not isinstance(data[0], np.ndarray | tuple)


def _split(item: Any, index: int) -> Chunk:
    if isinstance(item, tuple):
        if len(item) != 2:
            raise ValueError(f"chunk {index} must be rows or a (rows, weights) pair")
        rows = as_float_array(item[0], f"chunk {index} rows")
        weights = as_float_array(item[1], f"chunk {index} weights")
    else:
        rows = as_float_array(item, f"chunk {index}")
        weights = np.ones(rows.shape[0] if rows.ndim else 0)
    if rows.ndim != 2 or rows.shape[1] == 0:
        raise ValueError(f"chunk {index} must be 2-D (rows, d) with d >= 1; got {rows.shape}")
    if weights.shape != (rows.shape[0],):
        raise ValueError(f"chunk {index} weights must have shape ({rows.shape[0]},)")
    return rows, weights


@dataclass(frozen=True)
class Summary:
    """What one pass over the data tells: counts, moments, ranges and a uniform sample.

    ``scale`` is each feature's standard deviation, computed without squaring values
    (so data near the float range has one too); ``low`` and ``high`` are each feature's
    extreme values and ``low_row`` and ``high_row`` the rows that hold them."""

    rows: int
    total_weight: float
    mean: FloatArray
    scale: FloatArray
    sample: FloatArray
    sample_weights: FloatArray
    sample_keys: FloatArray  # the reservoir keys: the smallest m of them are a uniform m-sample
    low: FloatArray
    high: FloatArray
    low_row: np.ndarray
    high_row: np.ndarray


@dataclass(frozen=True)
class PartSummary:
    """``summarise_part`` of consecutive rows: ``merge_parts`` adds parts in order.

    The reservoir holds the part's rows of smallest keys, with their keys and global
    row indices; ``moments`` is None for a part of no positive weight, ``extremes``
    for a part of no rows."""

    rows: int
    moments: Moments | None
    keys: FloatArray
    sample: FloatArray
    sample_weights: FloatArray
    index: np.ndarray
    extremes: Extremes | None = None


def summarise(source: Iterable[Chunk], seed: int) -> Summary:
    """Check every value and collect weighted moments, ranges and a reservoir sample."""
    return merge_parts([summarise_part(source, seed, 0)])


def summarise_part(chunks: Iterable[Chunk], seed: int, offset: int) -> PartSummary:
    """``summarise`` of rows that start at row ``offset`` of the whole data.

    Row i's reservoir key is the i-th uniform draw of the seed's generator (PCG64,
    advanced to ``offset`` in O(log offset) steps), so the sample is the rows of the
    smallest keys however the rows are chunked or split into parts.
    """
    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed)).advance(offset))
    rows_seen = 0
    moments: Moments | None = None
    extremes: Extremes | None = None
    keys = np.empty(0)
    kept_rows: list[FloatArray] = []
    kept_weights: list[FloatArray] = []
    kept_index = np.empty(0, dtype=np.int64)
    for rows, weights in chunks:
        _check_chunk(rows, weights, offset + rows_seen)
        moments = Moments.merged(moments, Moments.of(rows, weights))
        extremes = Extremes.merged(extremes, Extremes.of(rows, offset + rows_seen))
        keys = np.concatenate([keys, rng.random(rows.shape[0])])
        kept_rows.append(rows)
        kept_weights.append(weights)
        kept_index = np.concatenate([kept_index,
                                     offset + rows_seen + np.arange(rows.shape[0])])
        rows_seen += rows.shape[0]
        if keys.size > 2 * RESERVOIR_ROWS:
            keys, kept_rows, kept_weights, kept_index = _shrink(
                keys, kept_rows, kept_weights, kept_index
            )
    if not kept_rows:
        return PartSummary(0, None, keys, np.empty((0, 0)), np.empty(0), kept_index)
    keys, kept_rows, kept_weights, kept_index = _shrink(keys, kept_rows, kept_weights, kept_index)
    return PartSummary(rows_seen, moments, keys, kept_rows[0], kept_weights[0], kept_index,
                       extremes)


def merge_parts(parts: Iterable[PartSummary]) -> Summary:
    """The Summary of the whole data from its parts' summaries, given in row order."""
    moments: Moments | None = None
    extremes: Extremes | None = None
    rows_seen = 0
    keys, kept_rows, kept_weights, kept_index = [], [], [], []
    for part in parts:
        moments = Moments.merged(moments, part.moments)
        extremes = Extremes.merged(extremes, part.extremes)
        rows_seen += part.rows
        if part.rows:
            keys.append(part.keys)
            kept_rows.append(part.sample)
            kept_weights.append(part.sample_weights)
            kept_index.append(part.index)
    if rows_seen == 0 or moments is None or extremes is None:
        raise ValueError("the training data has no rows with positive weight")
    all_keys, rows, weights, index = _shrink(np.concatenate(keys), kept_rows, kept_weights,
                                             np.concatenate(kept_index))
    order = np.argsort(index)
    return Summary(
        rows=rows_seen,
        total_weight=moments.total,
        mean=moments.mean,
        scale=moments.scale(),
        sample=rows[0][order],
        sample_weights=weights[0][order],
        sample_keys=all_keys[order],
        low=extremes.low,
        high=extremes.high,
        low_row=extremes.low_row,
        high_row=extremes.high_row,
    )


@dataclass(frozen=True)
class Moments:
    """Weighted mean and scatter of some rows, added group by group with Chan et al.'s
    pairwise update, which keeps the variance accurate across groups.

    The scatter is kept in units of a power of two per feature (``unit``, at least the
    largest deviation seen), so values near the float range cannot overflow it, and
    scaling by it is exact."""

    total: float
    mean: FloatArray
    scatter: FloatArray  # in units of unit**2
    unit: FloatArray

    @classmethod
    def of(cls, rows: FloatArray, weights: FloatArray) -> Moments | None:
        total = float(weights.sum())
        if total <= 0:
            return None
        unit = power_of_two_above(np.abs(rows).max(axis=0))
        scaled = rows / unit
        mean = weights @ scaled / total
        return cls(total, mean * unit, weights @ (scaled - mean) ** 2, unit)

    @staticmethod
    def merged(a: Moments | None, b: Moments | None) -> Moments | None:
        if a is None or b is None:
            return a or b
        unit = np.maximum(a.unit, b.unit)
        delta = b.mean / unit - a.mean / unit
        total = a.total + b.total
        scatter = (a.scatter * (a.unit / unit) ** 2 + b.scatter * (b.unit / unit) ** 2
                   + delta**2 * (a.total * b.total / total))
        mean = (a.mean / unit + delta * (b.total / total)) * unit
        return Moments(total, mean, scatter, unit)

    def scale(self) -> FloatArray:
        """The standard deviation of each feature."""
        return np.sqrt(self.scatter / self.total) * self.unit


@dataclass(frozen=True)
class Extremes:
    """Each feature's smallest and largest value, and the (global) rows holding them."""

    low: FloatArray
    high: FloatArray
    low_row: np.ndarray
    high_row: np.ndarray

    @classmethod
    def of(cls, rows: FloatArray, offset: int) -> Extremes | None:
        if rows.shape[0] == 0:
            return None
        low_row, high_row = rows.argmin(axis=0), rows.argmax(axis=0)
        columns = np.arange(rows.shape[1])
        return cls(rows[low_row, columns], rows[high_row, columns], low_row + offset,
                   high_row + offset)

    @staticmethod
    def merged(a: Extremes | None, b: Extremes | None) -> Extremes | None:
        if a is None or b is None:
            return a or b
        lower, higher = b.low < a.low, b.high > a.high
        return Extremes(np.where(lower, b.low, a.low), np.where(higher, b.high, a.high),
                        np.where(lower, b.low_row, a.low_row),
                        np.where(higher, b.high_row, a.high_row))


def power_of_two_above(values: FloatArray) -> FloatArray:
    """The smallest power of two at least ``values`` (1 for 0), at most 2**1023."""
    _, exponents = np.frexp(values)
    return np.ldexp(1.0, np.minimum(exponents, 1023))


def _shrink(
    keys: FloatArray, rows: list[FloatArray], weights: list[FloatArray], index: np.ndarray
) -> tuple[FloatArray, list[FloatArray], list[FloatArray], np.ndarray]:
    all_rows = np.concatenate(rows)
    all_weights = np.concatenate(weights)
    if keys.size > RESERVOIR_ROWS:
        keep = np.argpartition(keys, RESERVOIR_ROWS)[:RESERVOIR_ROWS]
        return keys[keep], [all_rows[keep]], [all_weights[keep]], index[keep]
    return keys, [all_rows], [all_weights], index


def _check_chunk(rows: FloatArray, weights: FloatArray, offset: int) -> None:
    finite = np.isfinite(rows)
    if not finite.all():
        row, column = (int(i) for i in np.argwhere(~finite)[0])
        raise ValueError(
            f"training row {offset + row} has a missing or non-finite value in column "
            f"{column}; fitting needs complete rows (drop or impute them first)"
        )
    if not (np.isfinite(weights) & (weights >= 0)).all():
        row = int(np.argmax(~(np.isfinite(weights) & (weights >= 0))))
        raise ValueError(f"weight of training row {offset + row} must be finite and >= 0")
