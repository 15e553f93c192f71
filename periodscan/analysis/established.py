"""What the data established when verdicts are open: an upper bound on damage at every window.

When windows stay undetermined, the sweep still supports a statement such as "a 15-epoch
deficit does less than 1.8 points of damage at every start measured (95%, Holm over 5
starts)". The bound X is the smallest value for which Holm's procedure, run over the same
family as the verdicts, rejects "mean damage >= X" for every window of the family:

* For each window j and a candidate X, ``q_j(X)`` is twice the one-sided t p-value of
  "mean damage_j >= X" (capped at 1): the two-sided p-value of the verdicts' test, decided in
  the direction of the mean, with X in place of the tolerance. It falls as X grows, so the set
  of X at which Holm rejects every window is a half-line [X, inf); :func:`holm_upper_bound`
  finds its end by bisection.
* Why this is a valid simultaneous bound at the confidence level: if some true mean damage were
  at least X, then at the fixed (not data-chosen) value X' = the largest true mean, Holm would
  reject every window, including one whose hypothesis "mean >= X'" is true; Holm's procedure
  does that with probability at most alpha (Holm 1979).
* The largest of the windows' own Holm bounds (``holm_high``) is not such a bound: those use
  step levels alpha / (m - k + 1) chosen by the ranks at the tolerance, and together they can
  cover less than 1 - alpha. The bound here lies between the largest unadjusted upper bound and
  the largest Bonferroni one (level alpha / m).
* With the tolerance in place of X the test is exactly the verdicts', so the bound is below the
  tolerance exactly when every window of the family is safe.
* Windows with fewer than 2 seeds have no test and are left out (and named); a family padded
  to ``family_size`` (a design that chose its starts) counts the padding with p = 1.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
from scipy import stats

from periodscan.analysis.stats import NO_SPREAD_RELATIVE, holm
from periodscan.analysis.verdicts import UNDETERMINED

#: Bisection stops when the bracket is this narrow (points of damage).
BOUND_PRECISION = 1e-9


@dataclass(frozen=True)
class Established:
    """Mean damage is below ``bound`` points at every window in ``starts`` (with ``length``),
    at ``confidence``, Holm-corrected over ``family`` hypotheses; ``left_out`` are the starts
    of the family without a test (fewer than 2 seeds)."""

    bound: float
    confidence: float
    length: int | None
    starts: tuple[int, ...]
    family: int
    left_out: tuple[int, ...] = ()


def below_pvalues(means, sds, ns, x: float) -> np.ndarray:
    """Per window: twice the one-sided t p-value of "mean damage >= x", capped at 1.

    A window with no spread (sd 0) gets 0 when its mean is below ``x`` and 1 otherwise.
    """
    means, sds, ns = (np.asarray(v, dtype=float) for v in (means, sds, ns))
    out = np.ones(len(means))
    spread = sds > 0
    t = (means[spread] - x) / (sds[spread] / np.sqrt(ns[spread]))
    out[spread] = np.minimum(1.0, 2 * stats.t.cdf(t, df=ns[spread] - 1))
    out[~spread] = np.where(means[~spread] < x, 0.0, 1.0)
    return out


def all_rejected(pvalues: np.ndarray, alpha: float, family_size: int | None = None) -> bool:
    """True when Holm's procedure over ``pvalues`` (padded with 1s to ``family_size``) rejects
    every one of them."""
    padded = np.concatenate([pvalues, np.ones(max(0, (family_size or 0) - len(pvalues)))])
    return bool((holm(padded)[:len(pvalues)] <= alpha).all())


def holm_upper_bound(means, sds, ns, confidence: float = 0.95,
                     family_size: int | None = None) -> float:
    """The smallest X at which Holm rejects "mean damage >= X" for every window (see the
    module docstring). ``means``, ``sds`` and ``ns`` describe windows with at least 2 seeds."""
    means, sds, ns = (np.asarray(v, dtype=float) for v in (means, sds, ns))
    if len(means) == 0:
        return math.nan
    alpha = 1.0 - confidence
    m = max(len(means), family_size or 0)
    se = sds / np.sqrt(ns)
    low = float(means.max())
    high = float((means + stats.t.ppf(1 - alpha / (2 * m), df=ns - 1) * se).max())
    high = max(high, low) + BOUND_PRECISION
    while high - low > BOUND_PRECISION * max(1.0, abs(high)):
        middle = (low + high) / 2
        if all_rejected(below_pvalues(means, sds, ns, middle), alpha, family_size):
            high = middle
        else:
            low = middle
    return high


def verdict_sd(row) -> float:
    """The standard deviation the verdicts' t test used for a table row: the damage sd, or, when
    the seeds did not spread, the floor of one test example the test put in its place, read
    back from the row's two-sided p-value (0 when there was no floor)."""
    sd = float(row.damage_sd)
    if sd > NO_SPREAD_RELATIVE * max(1.0, abs(float(row.damage))):
        return sd
    p, gap, n = float(row.p_value), abs(float(row.damage) - float(row.tolerance)), int(row.seeds)
    if 0 < p < 1 and gap > 0:
        return gap * math.sqrt(n) / float(stats.t.isf(p / 2, df=n - 1))
    return 0.0


def family_bound(rows: pd.DataFrame, family_size: int | None = None) -> Established | None:
    """The bound over one Holm family of table rows (one length of a window design, or every
    window of a removal design); None when no window of it has 2 seeds or more. Rows screened
    by an adaptive design (``confirmed`` False) are outside the family, as for the verdicts."""
    if "confirmed" in rows:
        rows = rows[rows.confirmed.astype(bool)]
    if rows.empty:
        return None
    tested = rows[(rows.seeds >= 2) & rows.damage.notna()]
    left_out = tuple(int(s) for s in rows.start[~rows.index.isin(tested.index)])
    if tested.empty:
        return None
    sds = [verdict_sd(r) for r in tested.itertuples()]
    bound = holm_upper_bound(tested.damage, sds, tested.seeds, float(rows.confidence.iloc[0]),
                             family_size)
    lengths = rows.length.unique()
    return Established(bound=bound, confidence=float(rows.confidence.iloc[0]),
                       length=int(lengths[0]) if len(lengths) == 1 else None,
                       starts=tuple(int(s) for s in tested.start),
                       family=max(len(tested), family_size or 0), left_out=left_out)


def table_bounds(table: pd.DataFrame, per_length: bool = True,
                 family_size: int | None = None) -> list[Established]:
    """One bound per Holm family of a table with verdicts: per length (window designs) or one
    for the whole table (``per_length`` False, a removal design)."""
    if table.empty or "verdict" not in table:
        return []
    if not per_length:
        bound = family_bound(table, family_size)
        return [] if bound is None else [replace(bound, length=None)]
    bounds = [family_bound(rows, family_size) for _, rows in table.groupby("length", sort=True)]
    return [b for b in bounds if b is not None]


def has_open(table: pd.DataFrame) -> bool:
    """True when some window of the table is undetermined (when the bound is worth saying)."""
    return "verdict" in table and bool((table.verdict == UNDETERMINED).any())
