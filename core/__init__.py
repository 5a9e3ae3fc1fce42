"""Gaussian mixtures: score, sample, condition and fit. Pure numpy and scipy, no I/O."""

from ._data import PartSummary, Summary, as_source, merge_parts, summarise_part
from ._em import FitProgress, FitResult, RestartReport, fit
from ._estep import DistributedData, Expectation, Statistics, part_statistics, summed
from ._explain import Explanation
from ._mixture import Mixture
from ._quantiles import TRAINING_SAMPLE_ROWS, TailFractions, TrainingQuantiles, TrainingSample
from ._select import Candidate, Selection, select
from ._validation import STRUCTURES

__all__ = [
    "STRUCTURES",
    "TRAINING_SAMPLE_ROWS",
    "Candidate",
    "DistributedData",
    "Expectation",
    "Explanation",
    "FitProgress",
    "FitResult",
    "Mixture",
    "PartSummary",
    "RestartReport",
    "Selection",
    "Statistics",
    "Summary",
    "TailFractions",
    "TrainingQuantiles",
    "TrainingSample",
    "as_source",
    "fit",
    "merge_parts",
    "part_statistics",
    "select",
    "summarise_part",
    "summed",
]
