"""Passes over a source on a Dask cluster: one task per part (file or row group).

A fit worker with ``MIXSCORE_DASK_SCHEDULER`` set still drives the fit (heartbeat,
progress, cancellation); each pass over a source runs as Dask tasks that read their
part where a Dask worker runs and return the core's block statistics, added on the
driver in part order. The summary takes two passes: the parts' row counts (a part's
first global row fixes its reservoir keys), then their mergeable summaries. So the
same seed gives the model a single machine gives, up to rounding. A Dask worker that
dies mid-pass has its tasks rerun elsewhere by the scheduler.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from itertools import accumulate
from typing import Any

import numpy as np

from core import (
    DistributedData,
    Expectation,
    PartSummary,
    Statistics,
    Summary,
    merge_parts,
    part_statistics,
    summarise_part,
    summed,
)

from .sources import Part, ReadCount, Source

#: Seconds to reach the scheduler before the job fails saying so.
CONNECT_TIMEOUT_S = 10


class EngineError(RuntimeError):
    """The Dask cluster cannot be reached or gave up on a task."""


def connect(address: str) -> Any:
    """A Dask client of the scheduler at ``address``; EngineError when unreachable."""
    try:
        from distributed import Client
    except ImportError:
        raise EngineError("MIXSCORE_DASK_SCHEDULER is set but the fit worker lacks Dask: "
                          "pip install 'mixscore[dask]'") from None
    try:
        return Client(address, timeout=CONNECT_TIMEOUT_S, set_as_default=False)
    except (OSError, TimeoutError) as error:
        raise EngineError(f"the Dask scheduler at {address} cannot be reached: {error}") from None


class DaskSource(DistributedData):
    """A source whose passes run on the cluster of ``client``."""

    def __init__(self, client: Any, source: Source) -> None:
        self.client = client
        self.source = source
        self.parts = source.parts()
        self.passes = 0

    def summary(self, seed: int) -> Summary:
        counts = self._each(count_rows, self.source)
        self.source.rows_read = sum(count.read for count in counts)
        self.source.rows_skipped = sum(count.skipped for count in counts)
        kept = [count.read - count.skipped for count in counts]
        offsets = [0, *accumulate(kept)][:-1]
        return merge_parts(self._each(summarise_rows, self.source, seed, per_part=offsets))

    def statistics(self, expectations: Sequence[Expectation]) -> list[Statistics]:
        return summed(self._each(pass_statistics, self.source, list(expectations)))

    def _each(self, task: Any, *shared: Any, per_part: list[Any] | None = None) -> list[Any]:
        """``task(part, *shared[, item of per_part])`` for every part, in part order."""
        from distributed import KilledWorker

        self.passes += 1
        columns = [[argument] * len(self.parts) for argument in shared]
        futures = self.client.map(task, self.parts, *columns,
                                  *([per_part] if per_part is not None else []), pure=False)
        try:
            return list(self.client.gather(futures))
        except KilledWorker as error:
            raise EngineError(f"Dask gave up on a task: {error}") from None
        finally:
            self.client.cancel(futures)


def _chunks(source: Source, part: Part, count: ReadCount) -> Iterator[tuple[Any, Any]]:
    for rows in source.read(part, count):
        yield rows, np.ones(rows.shape[0])


def count_rows(part: Part, source: Source) -> ReadCount:
    count = ReadCount()
    for _ in source.read(part, count):
        pass
    return count


def summarise_rows(part: Part, source: Source, seed: int, offset: int) -> PartSummary:
    return summarise_part(_chunks(source, part, ReadCount()), seed, offset)


def pass_statistics(part: Part, source: Source, expectations: list[Expectation]
                ) -> list[Statistics] | None:
    return part_statistics(expectations, _chunks(source, part, ReadCount()))
