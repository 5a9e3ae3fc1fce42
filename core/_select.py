"""Model selection: fit a grid of component counts and structures, pick by BIC or AIC."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._em import FitResult, Options, ProgressCallback, _checked_seed, fit_prepared, prepared
from ._validation import check_positive_int, check_structure

CRITERIA = ("bic", "aic")


@dataclass(frozen=True)
class Candidate:
    """One row of the selection table."""

    components: int
    structure: str
    log_likelihood: float
    bic: float
    aic: float
    parameter_count: int
    converged: bool
    degenerate: bool
    held: int = 0


@dataclass(frozen=True)
class Selection:
    """The chosen fit and the table of every candidate, in the order tried."""

    best: FitResult
    criterion: str
    table: tuple[Candidate, ...]


def select(
    X: Any,
    components: Iterable[int] = range(1, 9),
    structures: Sequence[str] = ("full",),
    criterion: str = "bic",
    restarts: int = 4,
    max_iterations: int = 300,
    tolerance: float = 1e-6,
    ridge: float = 1e-9,
    init: str = "kmeans++",
    seed: int | None = None,
    weights: Any = None,
    resolution: Any = None,
    progress: ProgressCallback | None = None,
) -> Selection:
    """Fit every (components, structure) pair and keep the lowest criterion.

    BIC (Schwarz, 1978) is ``-2 log L + p ln n``; AIC is ``-2 log L + 2 p``.
    Degenerate fits (a component of too few effective rows) lose to any other; a
    component the guard holds (``held``) does not make a fit degenerate. The data is
    checked and summarised once; candidate i is fitted with the i-th seed spawned from
    ``seed``.
    Other parameters are those of ``fit``; ``progress`` also receives the candidate.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> X = np.vstack([rng.normal(-6, 1, (300, 1)), rng.normal(6, 1, (300, 1))])
    >>> select(X, components=[1, 2, 3], seed=2).best.mixture.components
    2
    """
    if criterion not in CRITERIA:
        raise ValueError(f"criterion must be one of {', '.join(CRITERIA)}; got {criterion!r}")
    counts = sorted({check_positive_int(c, "components") for c in components})
    if not counts:
        raise ValueError("components must list at least one component count")
    if isinstance(structures, str) or not structures:
        raise ValueError("structures must be a non-empty list of structure names")
    kinds = list(dict.fromkeys(check_structure(s) for s in structures))
    options = Options.checked(restarts, max_iterations, tolerance, ridge, init, resolution)
    seed = _checked_seed(seed)
    summary, passes = prepared(X, weights, seed)
    grid = [(count, kind) for kind in kinds for count in counts if count <= summary.rows]
    if not grid:
        raise ValueError(f"every component count exceeds the {summary.rows} training rows")
    seeds = np.random.SeedSequence(seed).spawn(len(grid))
    results = [
        fit_prepared(passes, summary, count, kind, options,
                     int(child.generate_state(1, np.uint64)[0] >> np.uint64(1)), progress,
                     candidate=i, candidates=len(grid))
        for i, ((count, kind), child) in enumerate(zip(grid, seeds, strict=True), start=1)
    ]
    table = tuple(
        Candidate(r.mixture.components, r.mixture.structure, r.log_likelihood, r.bic, r.aic,
                  r.parameter_count, r.converged, r.degenerate, len(r.held))
        for r in results
    )
    best = min(results, key=lambda r: (r.degenerate, getattr(r, criterion)))
    return Selection(best=best, criterion=criterion, table=table)
