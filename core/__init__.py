"""Gaussian mixtures: score, sample, condition and fit. Pure numpy and scipy, no I/O."""

from ._em import FitProgress, FitResult, RestartReport, fit
from ._mixture import Mixture
from ._quantiles import TrainingQuantiles
from ._validation import STRUCTURES

__all__ = [
    "STRUCTURES",
    "FitProgress",
    "FitResult",
    "Mixture",
    "RestartReport",
    "TrainingQuantiles",
    "fit",
]
