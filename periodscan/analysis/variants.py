"""Sensitivity tables and answers of a sweep that trains each window with several deficits.

Each variant (a severity level, or one of several deficits) gets its own sensitivity table
against the same clean baselines, with Holm's correction over the windows of one variant and
one length (:func:`variant_table`). Across variants the sweep answers two more questions:

* severity (:func:`severity_answers`): at each start, the most severe level that is safe with
  every milder level safe too, and the least severe level that is critical;
* several deficits (:func:`rank_lapses`): at each start, which lapse costs most, and whether it
  costs significantly more than the runner-up (paired by seed, Holm over the starts).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from periodscan.analysis.sensitivity import (
    TableOptions,
    paired_damage,
    resolution,
    sensitivity_table,
)
from periodscan.analysis.stats import holm, holm_levels, t_interval, t_test_vs
from periodscan.analysis.verdicts import CRITICAL, SAFE


def variant_table(runs: pd.DataFrame, schedule_epochs: int, options: TableOptions,
                  mcnemar: pd.DataFrame | None,
                  variants: list[tuple[str, dict[str, Any]]]) -> pd.DataFrame:
    """One sensitivity table per variant, stacked in the order of ``variants``.

    ``variants`` lists (key, columns): the key of the runs' ``variant`` column and the columns
    its rows gain (``{"deficit": "blur"}`` or ``{"severity": 2.0}``). The stacked table starts
    with ``variant`` and those columns, then the ordinary table's columns.
    """
    bases = runs[runs.is_baseline == 1]
    parts = []
    for key, columns in variants:
        mine = runs[(runs.is_baseline == 0) & (runs.variant == key)]
        tests = None if mcnemar is None else mcnemar[mcnemar.run_id.isin(mine.run_id)]
        part = sensitivity_table(pd.concat([bases, mine]), schedule_epochs, options, tests)
        if part.empty:
            continue
        extra = {"variant": key, **columns}
        part = part.assign(**extra)
        parts.append(part[[*extra, *(c for c in part.columns if c not in extra)]])
    if not parts:
        return pd.DataFrame()
    return pd.concat(parts, ignore_index=True)


def label_column(table: pd.DataFrame) -> str:
    """The column that tells the variants apart for a reader: 'deficit' or 'severity'."""
    return "deficit" if "deficit" in table else "severity"


@dataclass
class SeverityAnswer:
    """Severity levels at one start, for one deficit length; levels are listed mildest first.

    ``safe_up_to``: the most severe level that is safe with every milder level safe too (None
    when the mildest is not safe). ``critical_from``: the least severe critical level (None
    when none is critical). ``verdicts`` holds every measured level's verdict, mildest first,
    and ``keys`` its variant key (a sequential design does not measure every level everywhere).
    """

    start: int
    safe_up_to: Any
    critical_from: Any
    levels: list[Any]
    verdicts: list[str]
    damages: list[float]
    keys: list[str] = field(default_factory=list)

    def cells(self) -> dict[str, tuple[str, float]]:
        """(verdict, damage) of each measured level, by variant key."""
        return dict(zip(self.keys, zip(self.verdicts, self.damages, strict=True), strict=True))


def severity_answers(table: pd.DataFrame, length: int) -> list[SeverityAnswer]:
    """For each start of ``length``: the most severe safe level and the least severe critical
    one (see :class:`SeverityAnswer`). ``table`` is a severity sweep's variant table with
    verdicts, its variants stacked mildest first."""
    rows = table[table.length == length]
    order = list(pd.unique(rows.variant))
    out = []
    for start, group in rows.groupby("start", sort=True):
        group = group.set_index("variant").reindex([k for k in order if k in set(group.variant)])
        levels, verdicts = list(group.severity), [str(v) for v in group.verdict]
        safe_up_to = None
        for level, verdict in zip(levels, verdicts, strict=True):
            if verdict != SAFE:
                break
            safe_up_to = level
        critical = [lv for lv, v in zip(levels, verdicts, strict=True) if v == CRITICAL]
        out.append(SeverityAnswer(start=int(start), safe_up_to=safe_up_to,
                                  critical_from=critical[0] if critical else None,
                                  levels=levels, verdicts=verdicts,
                                  damages=[float(d) for d in group.damage],
                                  keys=[str(k) for k in group.index]))
    return out


@dataclass
class StartRanking:
    """Which lapse costs most at one start.

    ``order`` lists the variant keys by mean damage, most damaging first, with ``damages`` and
    ``verdicts`` alongside. ``gap`` is the mean paired difference in damage between the first
    and the second (over the ``seeds`` both finished), ``gap_low``/``gap_high`` its t interval
    at the level Holm tested it with, ``p_value`` the two-sided paired t test of "no
    difference" and ``p_holm`` that p-value Holm-adjusted over the starts of this length.
    ``clear`` is True when the first costs significantly more than the runner-up.
    """

    start: int
    order: list[str]
    damages: list[float]
    verdicts: list[str]
    seeds: int = 0
    gap: float = math.nan
    gap_low: float = math.nan
    gap_high: float = math.nan
    p_value: float = math.nan
    p_holm: float = math.nan
    clear: bool = False


def lapse_gap(first: pd.Series, second: pd.Series) -> np.ndarray:
    """Per-seed damage of ``first`` minus that of ``second`` (Series indexed by seed), over
    the seeds both have. Both are measured against the same baseline run of a seed, so this is
    the second run's accuracy minus the first's: a paired difference."""
    both = first.index.intersection(second.index)
    return (first.loc[both] - second.loc[both]).to_numpy(dtype=float)


def rank_lapses(runs: pd.DataFrame, table: pd.DataFrame, length: int,
                confidence: float) -> list[StartRanking]:
    """Rank the variants at every start of ``length`` by mean damage and test the first against
    the runner-up: a paired t test over seeds, Holm-corrected over the starts."""
    rows = table[table.length == length]
    paired = paired_damage(runs[runs.is_baseline.eq(1) | runs.length.eq(length)])
    rankings, gaps = [], []
    for start, group in rows.groupby("start", sort=True):
        group = group.sort_values("damage", ascending=False, na_position="last")
        ranking = StartRanking(start=int(start), order=list(group.variant),
                               damages=[float(d) for d in group.damage],
                               verdicts=[str(v) for v in group.get("verdict", "")])
        gap = np.array([])
        if len(group) >= 2:
            mine = paired[paired.start_epoch == start]
            per_seed = {k: v.set_index("seed").damage for k, v in mine.groupby("variant")}
            first, second = ranking.order[:2]
            if first in per_seed and second in per_seed:
                gap = lapse_gap(per_seed[first], per_seed[second])
        rankings.append(ranking)
        gaps.append(gap)
    _test_gaps(rankings, gaps, 1.0 - confidence, resolution(runs))
    return rankings


def _test_gaps(rankings: list[StartRanking], gaps: list[np.ndarray], alpha: float,
               sd_floor: float) -> None:
    """Fill each ranking's gap test; Holm over the starts whose gap has a p-value. A gap with
    no spread over seeds gets the spread of one test example (``sd_floor``), as damage does."""
    tests = [t_test_vs(gap, 0.0, sd_floor=sd_floor) for gap in gaps]
    pvalues = np.array([t.pvalue for t in tests])
    adjusted, levels = holm(pvalues), holm_levels(pvalues, alpha)
    for ranking, gap, test, p_adj, level in zip(rankings, gaps, tests, adjusted, levels,
                                                strict=True):
        ranking.seeds, ranking.gap = test.n, test.mean
        ranking.p_value, ranking.p_holm = test.pvalue, float(p_adj)
        if np.isfinite(level):
            bound = t_interval(gap, 1.0 - level, sd_floor=sd_floor)
            ranking.gap_low, ranking.gap_high = bound.low, bound.high
        ranking.clear = bool(np.isfinite(p_adj) and p_adj <= alpha and test.mean > 0)
