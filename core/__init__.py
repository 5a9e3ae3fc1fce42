"""Gaussian mixtures: score, sample, condition and fit. Pure numpy and scipy, no I/O."""

from ._em import FitProgress, FitResult, RestartReport, fit
from ._explain import Explanation
from ._mixture import Mixture
from ._quantiles import TRAINING_SAMPLE_ROWS, TailFractions, TrainingQuantiles, TrainingSample
from ._select import Candidate, Selection, select
from ._validation import STRUCTURES

__all__ = [
    "STRUCTURES",
    "TRAINING_SAMPLE_ROWS",
    "Candidate",
    "Explanation",
    "FitProgress",
    "FitResult",
    "Mixture",
    "RestartReport",
    "Selection",
    "TailFractions",
    "TrainingQuantiles",
    "TrainingSample",
    "fit",
    "select",
]
