"""Label windows critical, safe or undetermined against the user's tolerance, with Holm.

How the decision is made (and why):

* For each window, the paired t test of "mean damage = tolerance" over its seeds gives a
  two-sided p-value. One seed gives no p-value, so such a window is never decided.
* Holm's step-down procedure adjusts the p-values over one *family*: the windows of one deficit
  length (the windows that answer one planning question), or every window of a removal design.
* A window whose Holm-adjusted p-value is at most ``1 - confidence`` is decided, in the
  direction of its mean: **critical** when mean damage is above the tolerance, **safe** when it
  is below. Everything else is **undetermined**. A wide interval therefore never makes a window
  safe: safe needs the bound on the far side of the tolerance.
* The matching bounds (``holm_low``, ``holm_high``) are the t interval at the level Holm compared
  that window's p-value with, ``alpha / (m - k + 1)`` for the k-th smallest of m. A critical
  window has ``holm_low`` above the tolerance, a safe one ``holm_high`` below it. (Holm's rule
  also needs every window ranked before it to be decided, so in rare cases a bound clears the
  tolerance and the window stays undetermined.)
* ``more_seeds`` for an undetermined window: the extra seeds after which the t interval at the
  Bonferroni level ``alpha / m`` (Holm's strictest step, so a conservative guess) would likely
  clear the tolerance, assuming the observed mean and spread hold. Windows with one seed borrow
  the pooled spread of their family. ``inf`` means more than ``SETTLE_CAP`` seeds.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from periodscan.analysis.stats import holm, holm_levels, seeds_to_settle, t_interval, t_test_vs

CRITICAL, SAFE, UNDETERMINED = "critical", "safe", "undetermined"
VERDICT_COLUMNS = ["tolerance", "p_value", "p_holm", "holm_low", "holm_high", "verdict",
                   "more_seeds"]


def add_verdicts(table: pd.DataFrame, damages: dict[tuple[int, int], np.ndarray],
                 tolerance: float, confidence: float = 0.95, family: str = "length",
                 sd_floor: float = 0.0, family_size: int | None = None) -> pd.DataFrame:
    """Return ``table`` with :data:`VERDICT_COLUMNS` added.

    ``damages`` maps (start, length) to the per-seed damages of that window; ``family`` is
    ``"length"`` (Holm over the windows of each length) or ``"all"`` (one family).
    ``family_size`` counts windows that could have been measured but were not (a design that
    chose which starts to run): each family is padded to that size with p-values of 1, so the
    correction is never milder than the full grid's would be.
    """
    if family not in ("length", "all"):
        raise ValueError(f"family must be 'length' or 'all', got {family!r}")
    table = table.copy()
    for column in VERDICT_COLUMNS:
        table[column] = np.nan
    table["verdict"] = UNDETERMINED
    table["tolerance"] = float(tolerance)
    if table.empty:
        return table
    alpha = 1.0 - confidence
    keys = [None] * len(table) if family == "all" else list(table.length)
    for key in dict.fromkeys(keys):
        rows = [i for i, k in zip(table.index, keys, strict=True) if k == key]
        _decide_family(table, rows, damages, tolerance, alpha, sd_floor, family_size)
    return table


def _decide_family(table: pd.DataFrame, rows: list, damages, tolerance: float, alpha: float,
                   sd_floor: float, family_size: int | None = None) -> None:
    tests = [t_test_vs(damages.get((int(table.at[i, "start"]), int(table.at[i, "length"])), []),
                       tolerance, sd_floor=sd_floor) for i in rows]
    pvalues = np.array([t.pvalue for t in tests])
    padding = max(0, (family_size or 0) - len(pvalues))
    padded = np.concatenate([pvalues, np.ones(padding)])
    adjusted = holm(padded)[:len(pvalues)]
    levels = holm_levels(padded, alpha)[:len(pvalues)]
    m = int(np.isfinite(padded).sum())
    sds = [t.sd for t in tests if t.n >= 2 and np.isfinite(t.sd)]
    ns = [t.n for t in tests if t.n >= 2 and np.isfinite(t.sd)]
    pooled = _pooled_sd(sds, ns)
    for i, test, p_adj, level in zip(rows, tests, adjusted, levels, strict=True):
        table.at[i, "p_value"] = test.pvalue
        table.at[i, "p_holm"] = p_adj
        if np.isfinite(level):
            values = damages.get((int(table.at[i, "start"]), int(table.at[i, "length"])), [])
            bound = t_interval(values, 1.0 - level, sd_floor=sd_floor)
            table.at[i, "holm_low"], table.at[i, "holm_high"] = bound.low, bound.high
        if np.isfinite(p_adj) and p_adj <= alpha and test.mean != tolerance:
            table.at[i, "verdict"] = CRITICAL if test.mean > tolerance else SAFE
            continue
        sd = test.sd if test.n >= 2 else pooled
        table.at[i, "more_seeds"] = seeds_to_settle(test.mean, sd, max(test.n, 1), tolerance,
                                                    alpha / max(m, 1))


def _pooled_sd(sds: list[float], ns: list[int]) -> float:
    """Pooled standard deviation of several samples (weights n - 1)."""
    dof = sum(n - 1 for n in ns)
    if dof == 0:
        return math.nan
    return math.sqrt(sum((n - 1) * s * s for s, n in zip(sds, ns, strict=True)) / dof)

