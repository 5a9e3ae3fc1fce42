"""The degeneracy guard: tell a collapsing component from a thin but real one.

The likelihood of a Gaussian mixture is unbounded: a component that shrinks onto a
few rows, onto duplicated rows or onto a value a feature keeps exactly within a
regime gains without limit. A floor under every variance bounds it, but a floor
high enough to matter (a fraction of each feature's spread) also clips well-sampled
thin directions, such as those of near-collinear sensors, and costs fit. So the
guard keeps two floors per feature, after the eigenvalue bounds of constrained EM
(Hathaway, 1985; Ingrassia, 2004), applied per direction in each component:

* ``base``: what every direction keeps. With a measurement ``resolution`` r it is
  r^2 / 12, the variance of rounding to a grid of r (Sheppard, 1898): data rounded
  to r cannot show spread below it. Without one it is ``COLLAPSE`` (1e-10) of the
  feature's variance: no well-sampled direction of real data comes near, while a
  collapse reaches it within a few iterations.
* ``held``: where a direction that fell below ``base`` is held from then on, at
  ``HELD`` (1e-4) of the feature's variance, or r^2 / 12 with a resolution.

A component whose spread falls below ``base`` (or with fewer effective rows than its
structure needs) is re-seeded once per restart: an unlucky start should not decide
the fit. If it collapses again, its low features are held, and the fit report names
them. A held component of too few effective rows marks its restart degenerate.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._validation import FloatArray, as_float_array

COLLAPSE = 1e-10
HELD = 1e-4


@dataclass(frozen=True)
class HeldComponent:
    """A component the guard holds: which features, and how many rows it carries."""

    component: int
    features: tuple[int, ...]
    rows: float


def checked_resolution(resolution: object, dimension: int) -> FloatArray:
    """Per-feature resolution (d,), 0 where none is given (0 or None)."""
    if resolution is None:
        return np.zeros(dimension)
    if isinstance(resolution, list | tuple):
        resolution = [0.0 if value is None else value for value in resolution]
    values = as_float_array(resolution, "resolution")
    if values.shape != (dimension,):
        raise ValueError(f"resolution must have one value per feature ({dimension}); got "
                         f"shape {values.shape}")
    bad = ~(np.isfinite(values) & (values >= 0))
    if bad.any():
        j = int(np.argmax(bad))
        raise ValueError(f"resolution[{j}] must be a non-negative number (0: none); got "
                         f"{values[j]}")
    return values


@dataclass(frozen=True)
class Floors:
    """Per-feature floors (d,): ``base`` for every direction, ``held`` for collapsed ones."""

    base: FloatArray
    held: FloatArray
    resolved: np.ndarray  # features with a resolution: their floor is rounding, not collapse

    @classmethod
    def build(cls, variance: FloatArray, resolution: FloatArray, ridge: float) -> Floors:
        tiny = np.finfo(float).tiny
        rounding = resolution**2 / 12.0
        resolved = resolution > 0
        base = np.where(resolved, rounding, np.maximum(COLLAPSE * variance, tiny))
        held = np.where(resolved, rounding, np.maximum(HELD * variance, max(ridge, tiny)))
        return cls(base, held, resolved)

    def of(self, held: np.ndarray) -> FloatArray:
        """(k, d) floors of components with ``held`` (k, d) features."""
        return np.where(held, self.held, self.base)


class Guard:
    """One restart's record of re-seeded components and held features."""

    def __init__(self, floors: Floors, components: int, min_points: float) -> None:
        self.floors = floors
        self.min_points = min_points
        self.held = np.zeros((components, floors.base.size), dtype=bool)
        self.reseeded = np.zeros(components, dtype=bool)
        self.reseeds = 0

    def floor(self) -> FloatArray:
        return self.floors.of(self.held)

    def review(self, counts: FloatArray, low: np.ndarray) -> tuple[np.ndarray, bool]:
        """After an M-step: the components to re-seed now, and whether new features are
        held (the M-step is then redone with their floor)."""
        fresh = low & ~self.held
        collapsing = (counts < self.min_points) | (fresh & ~self.floors.resolved).any(axis=1)
        reseed = collapsing & ~self.reseeded
        self.reseeded |= reseed
        self.reseeds += int(reseed.sum())
        self.held[reseed] = False
        return np.flatnonzero(reseed), self.hold(fresh & ~reseed[:, None])

    def hold(self, low: np.ndarray) -> bool:
        """Hold ``low`` (k, d) features from now on; whether any is new."""
        fresh = low & ~self.held
        self.held |= fresh
        return bool(fresh.any())

    def collapsed(self, counts: FloatArray) -> bool:
        """Whether some component ended with fewer effective rows than it needs."""
        return bool((counts < self.min_points).any())

    def report(self, counts: FloatArray) -> tuple[HeldComponent, ...]:
        return tuple(HeldComponent(int(k), tuple(int(j) for j in np.flatnonzero(self.held[k])),
                                   float(counts[k]))
                     for k in np.flatnonzero(self.held.any(axis=1)))
