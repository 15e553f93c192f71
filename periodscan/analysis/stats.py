"""Interval estimates and tests for paired damage, each small enough to check against scipy.

Damage per seed is already a paired difference (baseline minus window run, same seed, same test
set), so every estimate here works on one vector of per-seed damages:

* :func:`t_interval` - Student-t interval of the mean (what ``scipy.stats.ttest_rel`` reports);
* :func:`bootstrap_interval` - BCa (or percentile) bootstrap via ``scipy.stats.bootstrap``;
* :func:`damage_interval` - picks one of the two by the number of seeds;
* :func:`t_test_vs` - the two-sided paired t test of "mean damage = tolerance";
* :func:`holm` - Holm's step-down adjustment of a family of p-values;
* :func:`seeds_to_settle` - how many seeds a t bound would likely need to clear the tolerance.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import stats

#: From this many seeds on, intervals are bootstrapped (BCa); below it, Student-t. Our choice:
#: BCa needs enough values for its jackknife acceleration to mean something.
BOOTSTRAP_MIN_SEEDS = 10
#: Resamples for the bootstrap (scipy's default) and its fixed seed, so a report is reproducible.
BOOTSTRAP_RESAMPLES = 9999
BOOTSTRAP_SEED = 0
#: Largest seed count :func:`seeds_to_settle` searches before it answers "more than this".
SETTLE_CAP = 200


@dataclass(frozen=True)
class Interval:
    """Mean with a two-sided confidence interval and the method and sample size behind it."""

    mean: float
    low: float
    high: float
    n: int
    method: str


def _clean(values) -> np.ndarray:
    values = np.asarray(values, dtype=float).ravel()
    return values[np.isfinite(values)]


#: A spread this small relative to the values is rounding, not variation: accuracies that are
#: equal as fractions of the test set can differ in the last bits after subtraction (sd ~1e-15).
NO_SPREAD_RELATIVE = 1e-9


def _no_spread(values: np.ndarray, sd: float) -> bool:
    """True when the sample's standard deviation is zero up to floating-point rounding."""
    scale = max(1.0, float(np.abs(values).max())) if len(values) else 1.0
    return sd <= NO_SPREAD_RELATIVE * scale


def t_interval(values, confidence: float = 0.95, sd_floor: float = 0.0) -> Interval:
    """Student-t interval for the mean of paired differences (NaN bounds for n < 2).

    ``sd_floor`` replaces a standard deviation of zero (every seed gave the same damage, up to
    floating-point rounding):
    with discrete accuracies that happens by chance, and a zero-width interval would claim a
    certainty the data do not have. The method then reads ``"t, sd floor"``.
    """
    values = _clean(values)
    n = len(values)
    if n == 0:
        return Interval(math.nan, math.nan, math.nan, 0, "none")
    mean = float(values.mean())
    if n < 2:
        return Interval(mean, math.nan, math.nan, n, "t")
    sd = float(values.std(ddof=1))
    method = "t"
    if _no_spread(values, sd):
        if sd_floor <= 0:
            return Interval(mean, mean, mean, n, method)
        sd, method = sd_floor, "t, sd floor"
    half = float(stats.t.ppf(0.5 + confidence / 2, df=n - 1)) * sd / math.sqrt(n)
    return Interval(mean, mean - half, mean + half, n, method)


def bootstrap_interval(values, confidence: float = 0.95, method: str = "BCa",
                       n_resamples: int = BOOTSTRAP_RESAMPLES,
                       seed: int = BOOTSTRAP_SEED) -> Interval:
    """Bootstrap interval of the mean with ``scipy.stats.bootstrap`` (``"BCa"`` or
    ``"percentile"``); degenerate samples (no spread) fall back to :func:`t_interval`."""
    values = _clean(values)
    n = len(values)
    if n < 2 or _no_spread(values, float(values.std())):
        return t_interval(values, confidence)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # scipy warns on degenerate BCa; we check for NaN below
        result = stats.bootstrap((values,), np.mean, confidence_level=confidence,
                                 n_resamples=n_resamples, method=method, rng=seed)
    low, high = result.confidence_interval
    if not (np.isfinite(low) and np.isfinite(high)):
        return t_interval(values, confidence)
    return Interval(float(values.mean()), float(low), float(high), n,
                    "BCa bootstrap" if method.lower() == "bca" else "percentile bootstrap")


def damage_interval(values, confidence: float = 0.95,
                    bootstrap_min: int = BOOTSTRAP_MIN_SEEDS, sd_floor: float = 0.0) -> Interval:
    """t interval for fewer than ``bootstrap_min`` seeds, BCa bootstrap from there on."""
    values = _clean(values)
    if len(values) >= bootstrap_min:
        return bootstrap_interval(values, confidence)
    return t_interval(values, confidence, sd_floor=sd_floor)


@dataclass(frozen=True)
class TTest:
    """Two-sided one-sample t test of ``mean = reference`` on per-seed damages."""

    mean: float
    sd: float
    n: int
    statistic: float
    pvalue: float


def t_test_vs(values, reference: float, sd_floor: float = 0.0) -> TTest:
    """Paired t test of mean damage against ``reference`` (the tolerance), two-sided.

    Equals ``scipy.stats.ttest_1samp(values, reference)``; with one seed (or none) the p-value is
    NaN, so such a window can never be declared safe or critical. A zero spread is replaced by
    ``sd_floor`` as in :func:`t_interval`.
    """
    values = _clean(values)
    n = len(values)
    if n < 2:
        mean = float(values.mean()) if n else math.nan
        return TTest(mean, math.nan, n, math.nan, math.nan)
    mean = float(values.mean())
    sd = float(values.std(ddof=1))
    if _no_spread(values, sd):
        sd = sd_floor if sd_floor > 0 else 0.0
    if sd == 0.0:
        gap = mean - reference
        stat = math.copysign(math.inf, gap) if gap else math.nan
        return TTest(mean, 0.0, n, stat, 0.0 if gap else 1.0)
    stat = (mean - reference) / (sd / math.sqrt(n))
    pvalue = float(2 * stats.t.sf(abs(stat), df=n - 1))
    return TTest(mean, sd, n, float(stat), pvalue)


def holm(pvalues) -> np.ndarray:
    """Holm step-down adjusted p-values (NaN entries stay NaN and do not count in the family).

    The k-th smallest of m p-values is multiplied by (m - k + 1), a running maximum keeps the
    order, and values are capped at 1 (Holm 1979; as ``multipletests(method="holm")``).
    """
    p = np.asarray(pvalues, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    m = len(ok)
    if m == 0:
        return out
    order = ok[np.argsort(p[ok], kind="mergesort")]
    scaled = p[order] * (m - np.arange(m))
    out[order] = np.minimum(np.maximum.accumulate(scaled), 1.0)
    return out


def holm_levels(pvalues, alpha: float) -> np.ndarray:
    """The two-sided test level Holm's step-down compares each p-value with: alpha / (m - k + 1)
    for the k-th smallest. A t interval at confidence ``1 - level`` excludes the reference
    exactly when that p-value clears its step."""
    p = np.asarray(pvalues, dtype=float)
    out = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    m = len(ok)
    order = ok[np.argsort(p[ok], kind="mergesort")]
    out[order] = alpha / (m - np.arange(m))
    return out


def seeds_to_settle(mean: float, sd: float, n: int, reference: float, level: float,
                    cap: int = SETTLE_CAP) -> float:
    """Extra seeds after which the t interval would likely exclude ``reference``.

    Assumes the observed mean and standard deviation stay what they are, and finds the smallest
    total N with ``t(1 - level/2, N - 1) * sd / sqrt(N) < |mean - reference|``; returns N - n.
    ``level`` is the two-sided test level the decision needs (the Bonferroni level alpha / m is
    the conservative choice under Holm). Returns ``inf`` when even ``cap`` seeds would not do, and
    NaN when the spread is unknown.
    """
    gap = abs(mean - reference)
    if not (np.isfinite(sd) and np.isfinite(gap)) or sd < 0:
        return math.nan
    if gap == 0:
        return math.inf
    if sd == 0:
        return float(max(0, 2 - n))
    totals = np.arange(max(n, 1) + 1, cap + 1)
    if len(totals) == 0:
        return math.inf
    half = stats.t.ppf(1 - level / 2, df=totals - 1) * sd / np.sqrt(totals)
    hits = totals[half < gap]
    return float(hits[0] - n) if len(hits) else math.inf
