"""Smoothing methods behind one interface (see :mod:`.base`); one module per method."""

from .base import Estimator, Fitted, Level
from .jm import MAX_LAMBDA, FittedJelinekMercer, JelinekMercer
from .kn import FittedKneserNey, KneserNey, unigram_floor

__all__ = [
    "Estimator", "Fitted", "Level", "JelinekMercer", "FittedJelinekMercer", "MAX_LAMBDA",
    "KneserNey", "FittedKneserNey", "unigram_floor",
]
