"""The standardised frame a fit runs in: each feature centred on its mean and divided
by its standard deviation.

EM in data units breaks at the ends of the float range: squared distances of data
at 1e160 overflow, covariances of data at 1e-160 underflow, and a ridge or a floor
fixed in data units means something else at every scale. In the standardised frame
every feature has unit spread, so ``fit(a X + b)`` is ``fit(X)`` mapped back, the
ridge and the guard's floors are fractions of each feature's variance, and a value
is refused only where its standardised square could overflow. Spherical components
need one scale for all features (a per-feature one would change their shape): the
root mean square of the features' standard deviations.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._covariance import Covariance
from ._data import Summary
from ._validation import FloatArray

#: Standard deviations a feature may have: its covariances, and the squared distances
#: of rows a few deviations out, must stay inside the float range in data units.
SCALE_LIMITS = (1e-152, 1e152)
#: Largest distance of a training value from its feature's mean, in standard
#: deviations: its square, summed over rows, stays far from overflow.
DEVIATION_LIMIT = 1e150


@dataclass(frozen=True)
class Frame:
    """Standardised rows are ``(x - center) / scale``."""

    center: FloatArray
    scale: FloatArray

    @classmethod
    def of(cls, summary: Summary, resolution: FloatArray, uniform: bool) -> Frame:
        """The frame of the summarised data, checked feature by feature (ValueError
        naming the feature, the row and the limit). A feature with no spread is
        scaled by its ``resolution`` when it has one; ``uniform``: one scale for all."""
        scale = summary.scale.copy()
        for j in range(scale.size):
            scale[j] = _checked_scale(summary, j, float(resolution[j]))
        if uniform:
            largest = scale.max()
            scale = np.full_like(scale, largest * np.sqrt(np.mean((scale / largest) ** 2)))
        return cls(summary.mean, scale)

    @property
    def log_jacobian(self) -> float:
        """Per row, log-densities in data units are those of the frame minus this."""
        return float(np.log(self.scale).sum())

    def standardised(self, rows: FloatArray) -> FloatArray:
        return (rows - self.center) / self.scale

    def means(self, standardised: FloatArray) -> FloatArray:
        """(k, d) means of the frame in data units."""
        return standardised * self.scale + self.center

    def covariance(self, standardised: Covariance) -> Covariance:
        return standardised.scaled(self.scale)


def _checked_scale(summary: Summary, j: int, resolution: float) -> float:
    low, high = float(summary.low[j]), float(summary.high[j])
    with np.errstate(over="ignore"):
        span = high - low
    if not np.isfinite(span):
        raise ValueError(
            f"feature {j} spans from {low!r} (training row {int(summary.low_row[j])}) to "
            f"{high!r} (row {int(summary.high_row[j])}), beyond the float range; rescale it")
    scale = float(summary.scale[j])
    if scale == 0:
        if resolution > 0:
            return resolution  # a feature held at one value: its spread is rounding's
        raise ValueError(
            f"feature {j} has no spread in the training data (every row has {low!r}); "
            "drop it, or give its resolution")
    mean = float(summary.mean[j])
    far_row, far = ((summary.high_row[j], high) if high - mean >= mean - low
                    else (summary.low_row[j], low))
    lowest, highest = SCALE_LIMITS
    if not lowest <= scale <= highest:
        raise ValueError(
            f"feature {j} has a standard deviation of {scale:.3g} (its farthest value: "
            f"{far!r} in training row {int(far_row)}), outside [{lowest:g}, {highest:g}]; "
            "rescale it")
    with np.errstate(over="ignore"):
        deviations = abs(far - mean) / scale
    if deviations > DEVIATION_LIMIT:
        raise ValueError(
            f"training row {int(far_row)}, feature {j}: {far!r} lies {deviations:.3g} "
            f"standard deviations from the feature's mean; the limit is {DEVIATION_LIMIT:g}")
    return scale
