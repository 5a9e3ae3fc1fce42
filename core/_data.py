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
    """What one pass over the data tells: counts, moments and a uniform sample."""

    rows: int
    total_weight: float
    mean: FloatArray
    variance: FloatArray
    sample: FloatArray
    sample_weights: FloatArray
    sample_keys: FloatArray  # the reservoir keys: the smallest m of them are a uniform m-sample


def summarise(source: ChunkSource, rng: np.random.Generator) -> Summary:
    """Check every value and collect weighted moments and a reservoir sample.

    The reservoir keeps the rows with the smallest uniform keys, drawn in row order,
    so the sample does not depend on how the rows are chunked.
    """
    rows_seen = 0
    total = 0.0
    mean: FloatArray | None = None
    scatter: FloatArray | None = None
    keys = np.empty(0)
    kept_rows: list[FloatArray] = []
    kept_weights: list[FloatArray] = []
    kept_index = np.empty(0, dtype=np.int64)
    for rows, weights in source:
        _check_chunk(rows, weights, rows_seen)
        chunk_total = float(weights.sum())
        if chunk_total > 0:
            chunk_mean = weights @ rows / chunk_total
            chunk_scatter = weights @ (rows - chunk_mean) ** 2
            if mean is None or scatter is None:
                mean, scatter = chunk_mean, chunk_scatter
            else:
                # Chan et al.'s pairwise update keeps the variance accurate across chunks.
                delta = chunk_mean - mean
                combined = total + chunk_total
                scatter = scatter + chunk_scatter + delta**2 * total * chunk_total / combined
                mean = mean + delta * chunk_total / combined
            total += chunk_total
        keys = np.concatenate([keys, rng.random(rows.shape[0])])
        kept_rows.append(rows)
        kept_weights.append(weights)
        kept_index = np.concatenate([kept_index, rows_seen + np.arange(rows.shape[0])])
        rows_seen += rows.shape[0]
        if keys.size > 2 * RESERVOIR_ROWS:
            keys, kept_rows, kept_weights, kept_index = _shrink(
                keys, kept_rows, kept_weights, kept_index
            )
    if rows_seen == 0 or mean is None or scatter is None:
        raise ValueError("the training data has no rows with positive weight")
    keys, kept_rows, kept_weights, kept_index = _shrink(keys, kept_rows, kept_weights, kept_index)
    order = np.argsort(kept_index)
    return Summary(
        rows=rows_seen,
        total_weight=total,
        mean=mean,
        variance=scatter / total,
        sample=kept_rows[0][order],
        sample_weights=kept_weights[0][order],
        sample_keys=keys[order],
    )


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
