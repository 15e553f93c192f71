"""Verdicts for windows whose seeds were added in stages: group-sequential t tests, alpha shared
over the family (Holm, or a graph of shares).

Each window (one start, one deficit variant) is tested at every stage it has reached: the paired
t test of "mean damage = tolerance" on its first ``stages.seeds[k]`` seeds (in the order the
design adds them), against the nominal level of look k of a group-sequential design with an
alpha-spending function (:mod:`periodscan.analysis.sequential`). Holm's procedure runs over the
family (the candidate starts of one variant, unmeasured ones never rejected) in its
group-sequential form: a window decided at any look passes its level on to the others, whose
boundaries are then recomputed for the larger level. With a ``graph``
(:mod:`periodscan.analysis.alpha_graph`) the shares of alpha start and pass as the graph says
instead of evenly. A window is decided at the first look
that crosses, in the direction of its mean there; the design stops adding seeds to it, so the
verdict is final.

An undecided window stops (undetermined) at the cap, or earlier for **futility**: when, taking
its observed mean and spread as the truth, the chance that the test at the cap would cross is
below ``futility`` (conditional power). Stopping for futility only ever withholds a verdict, so
it cannot raise the error rate of the verdicts given.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from periodscan.analysis.alpha_graph import AlphaGraph, graph_rejections
from periodscan.analysis.sensitivity import paired_damage
from periodscan.analysis.sequential import Stages, conditional_power, sequential_holm
from periodscan.analysis.stats import seeds_to_settle, t_interval, t_test_vs
from periodscan.analysis.verdicts import CRITICAL, SAFE, UNDETERMINED, VERDICT_COLUMNS

#: Why a window gets no more seeds: a verdict, futility, the cap; "open" when it still may.
DECIDED, FUTILE, AT_CAP, OPEN = "decided", "futile", "at cap", "open"
#: Futility is not judged on the first look: two degrees of freedom say too little of the spread.
FUTILITY_FROM_LOOK = 1


@dataclass(frozen=True, kw_only=True)
class StagedRule:
    """How staged windows are judged."""

    stages: Stages
    tolerance: float
    confidence: float = 0.95
    futility: float = 0.0
    family_size: int | None = None
    sd_floor: float = 0.0
    #: Shares of alpha over the starts in ``family`` (the graph's hypotheses, in its order);
    #: None: Holm over ``family_size``.
    graph: AlphaGraph | None = None
    family: tuple[int, ...] = ()
    #: Per variant key, shares that replace ``graph`` for that variant's family (None there:
    #: Holm), as (key, graph) pairs.
    variant_graphs: tuple[tuple[str, AlphaGraph | None], ...] = ()

    def for_variant(self, key: str) -> StagedRule:
        """The rule of one variant's family."""
        graphs = dict(self.variant_graphs)
        return replace(self, graph=graphs[key]) if key in graphs else self

    @property
    def alpha(self) -> float:
        return 1.0 - self.confidence


def seed_damages(runs: pd.DataFrame,
                 order: list[int] | None = None) -> dict[tuple[str, int], pd.Series]:
    """Per (variant key, start): damage by seed, indexed by the seed's place in ``order`` (the
    order seeds are added in; default: seeds 0, 1, 2, ...), so "the first n seeds" is index < n.
    Seeds outside ``order`` are left out."""
    paired = paired_damage(runs)
    if "variant" not in paired:
        paired = paired.assign(variant="")
    if order is not None:
        place = {int(seed): i for i, seed in enumerate(order)}
        paired = paired[paired.seed.isin(place)].assign(seed=lambda f: f.seed.map(place))
    out = {}
    for (variant, start), group in paired.groupby(["variant", "start_epoch"]):
        out[(str(variant), int(start))] = group.set_index("seed").damage.sort_index()
    return out


def looks_of(damage: pd.Series, stages: Stages, tolerance: float, sd_floor: float) -> list:
    """The t test at each stage the window has reached (its first n_k seeds)."""
    seeds = int(damage.index.max()) + 1 if len(damage) else 0
    return [t_test_vs(damage[damage.index < n].to_numpy(), tolerance, sd_floor=sd_floor)
            for n in stages.seeds if n <= seeds]


def add_staged_verdicts(table: pd.DataFrame, damages: dict[tuple[str, int], pd.Series],
                        rule: StagedRule) -> pd.DataFrame:
    """``table`` (one row per start, a ``variant`` column with variants) with verdicts, Holm
    family per variant, and ``stopped`` saying why each window gets no more seeds."""
    table = table.copy()
    for column in VERDICT_COLUMNS:
        table[column] = np.nan
    table["verdict"], table["stopped"], table["tolerance"] = UNDETERMINED, OPEN, rule.tolerance
    table["confirmed"] = True
    if table.empty:
        return table
    keys = table.variant.astype(str) if "variant" in table else pd.Series("", index=table.index)
    for key in dict.fromkeys(keys):
        rows = [i for i in table.index if keys[i] == key]
        _judge_family(table, rows, [damages.get((key, int(table.at[i, "start"])), pd.Series(
            dtype=float)) for i in rows], rule.for_variant(key))
    return table


def _judge_family(table: pd.DataFrame, rows: list, series: list[pd.Series],
                  rule: StagedRule) -> None:
    stages = rule.stages
    looks = [looks_of(d, stages, rule.tolerance, rule.sd_floor) for d in series]
    pvalues = [[t.pvalue if np.isfinite(t.pvalue) else 1.0 for t in tests] for tests in looks]
    crossed, levels, hopes = crossings(pvalues, [int(table.at[i, "start"]) for i in rows], rule)
    for i, tests, damage, look, level, hope in zip(rows, looks, series, crossed, levels, hopes,
                                                   strict=True):
        if not tests:
            continue
        at = len(tests) - 1 if look is None else look
        table.at[i, "p_value"] = tests[-1].pvalue
        nominal = float(stages.levels(level)[at]) if level > 0 else 0.0
        if nominal > 0:
            bound = t_interval(damage[damage.index < stages.seeds[at]].to_numpy(),
                               1.0 - nominal, sd_floor=rule.sd_floor)
            table.at[i, "holm_low"], table.at[i, "holm_high"] = bound.low, bound.high
        table.at[i, "verdict"], table.at[i, "stopped"] = decide(tests, look, hope, rule)
        last = tests[-1]
        if table.at[i, "stopped"] != DECIDED and hope > 0:
            table.at[i, "more_seeds"] = seeds_to_settle(last.mean, last.sd, max(last.n, 1),
                                                        rule.tolerance, hope)


def crossings(pvalues: list[list[float]], starts: list[int],
               rule: StagedRule) -> tuple[list[int | None], list[float], list[float]]:
    """Per row: the look it was decided at (None if not), its level at the end, and the
    level open windows are judged at for futility (with a graph: the level it would reach if
    the starts passing to it, directly or through one other, were decided next, so a start the
    graph feeds later is not written off before its neighbours are decided)."""
    if rule.graph is None:
        crossed = sequential_holm(pvalues, rule.stages, rule.alpha, rule.family_size)
        m = max(rule.family_size or 0, len(pvalues))
        level = rule.alpha / max(m - sum(c is not None for c in crossed), 1)
        return crossed, [level] * len(pvalues), [level] * len(pvalues)
    index = {s: k for k, s in enumerate(rule.family)}
    missing = [s for s in starts if s not in index]
    if missing:
        raise ValueError(f"starts {missing} are not in the graph's family {rule.family}")
    looks: list[list[float]] = [[] for _ in rule.family]
    for start, p in zip(starts, pvalues, strict=True):
        looks[index[start]] = p
    result = graph_rejections(looks, rule.stages, rule.alpha, rule.graph)
    at = [index[s] for s in starts]
    return ([result.crossed[k] for k in at], [rule.alpha * result.shares[k] for k in at],
            [rule.alpha * result.reachable[k] for k in at])


def decide(tests: list, look: int | None, level: float, rule: StagedRule) -> tuple[str, str]:
    """Verdict of one window from its looks and the look that crossed (None if none), and why
    it gets no more seeds: decided in the direction of its mean at that look, else undetermined
    (at cap, futile at ``level``, or open)."""
    if look is not None and tests[look].mean != rule.tolerance:
        return (CRITICAL if tests[look].mean > rule.tolerance else SAFE), DECIDED
    return UNDETERMINED, why_open(tests[-1], len(tests) - 1, level, rule)


def why_open(test, look: int, level: float, rule: StagedRule) -> str:
    """At cap, futile (conditional power below ``rule.futility``), or open."""
    stages = rule.stages
    if look >= len(stages.seeds) - 1:
        return AT_CAP
    if look < FUTILITY_FROM_LOOK or rule.futility <= 0:
        return OPEN
    if level <= 0:
        return OPEN  # its share may still come, through starts not decided yet
    critical = float(stages.t_critical(level)[-1])
    power = conditional_power(test.mean, test.sd, test.n, rule.tolerance, stages.cap, critical)
    return FUTILE if power < rule.futility else OPEN
