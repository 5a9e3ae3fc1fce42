"""Gaussian mixtures: score, sample, condition and fit. Pure numpy and scipy, no I/O."""

from ._mixture import Mixture
from ._validation import STRUCTURES

__all__ = ["STRUCTURES", "Mixture"]
