"""Interval estimates for paired damage.

Kept separate from the table code so each formula can be checked against scipy on its own.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats


@dataclass(frozen=True)
class Interval:
    """Mean with a two-sided confidence interval and the method and sample size behind it."""

    mean: float
    low: float
    high: float
    n: int
    method: str


def t_interval(values: np.ndarray, confidence: float = 0.95) -> Interval:
    """Student-t interval for the mean of paired differences (NaN bounds for n < 2)."""
    values = np.asarray(values, dtype=float)
    n = len(values)
    if n == 0:
        return Interval(math.nan, math.nan, math.nan, 0, "none")
    mean = float(values.mean())
    if n < 2:
        return Interval(mean, math.nan, math.nan, n, "t")
    sem = float(values.std(ddof=1)) / math.sqrt(n)
    if sem == 0.0:
        return Interval(mean, mean, mean, n, "t")
    half = float(stats.t.ppf(0.5 + confidence / 2, df=n - 1)) * sem
    return Interval(mean, mean - half, mean + half, n, "t")
