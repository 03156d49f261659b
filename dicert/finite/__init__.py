"""Finite-size certification: from the counts of n trials to a certified (smooth) min-entropy.

- :mod:`dicert.finite.params`: what a protocol fixes before the run (thresholds, errors).
- :mod:`dicert.finite.result`: :class:`FiniteSizeResult`, returned by every method.
"""

from dicert.finite.params import EatParams, MartingaleParams
from dicert.finite.result import FiniteSizeResult

__all__ = ["EatParams", "FiniteSizeResult", "MartingaleParams"]
