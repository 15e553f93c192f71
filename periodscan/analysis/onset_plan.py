"""How late may it be? The latest epoch within tolerance, for onset and removal sweeps.

Two questions share one answer (:class:`EpochAnswer`, one row per measured epoch):

* **onset** design: "the latest epoch at which switching costs at most the tolerance, compared
  with switching at 0". Each onset t > 0 is judged on its delay cost (see
  :mod:`periodscan.analysis.onset`): the two-sided paired t test of "mean delay cost =
  tolerance" over seeds (the test ``scipy.stats.ttest_rel`` makes on the onset-0 accuracies
  less the tolerance against the onset-t accuracies), Holm-corrected over the onsets and decided
  in the direction of the mean, exactly as window verdicts are
  (:func:`periodscan.analysis.verdicts.add_verdicts`). Switching at 0 is the reference.
* **removal** design: "until which epoch may the deficit (a curriculum, say) last?". Each end
  epoch is judged on its damage against never having the deficit, with the table's verdicts
  (Holm over every end epoch of the design).

The answer is the latest measured epoch that is established within the tolerance *and* has
every measured epoch before it established within the tolerance too: later epochs cost more as
a rule, and asking for the whole stretch keeps the answer safe when they do not. Epochs within
the tolerance after one that is not are listed, and said, but not taken.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd

from periodscan.analysis.onset import delay_costs
from periodscan.analysis.planner import (
    FIXED_RECOVERY,
    METHOD,
    PRODUCTION_MAPPING,
    PROXY,
    RUNS_DIVERGED,
    RUNS_LOST,
    SHORT_RECOVERY,
    UNDETERMINED,
    Fact,
    check_question,
)
from periodscan.analysis.sensitivity import resolution
from periodscan.analysis.verdicts import CRITICAL, SAFE, add_verdicts
from periodscan.errors import SweepError

#: What an answer judges against the tolerance.
DELAY_COST = "delay_cost"  # onset t against onset 0, paired by seed
DAMAGE = "damage"  # against never making the change (the baseline)
#: Fact codes beyond the planner's (phrased by :mod:`periodscan.views.onset`).
LATER_WITHIN = "later_within"  # starts: within tolerance, but after an epoch that is not
NO_REFERENCE = "no_reference"  # the onset-0 runs are missing: no delay cost can be measured


@dataclass
class EpochRow:
    """One measured epoch: the judged value with its intervals and verdict, and its damage
    against never making the change (the same numbers as the judged ones for a removal)."""

    epoch: int
    seeds: int
    value: float
    low: float
    high: float
    holm_low: float
    holm_high: float
    p_value: float
    p_holm: float
    verdict: str
    more_seeds: float
    damage: float
    damage_low: float
    damage_high: float
    damage_verdict: str
    recovery_epochs: int = 0
    short_recovery: bool = False
    diverged: int = 0
    lost: int = 0


@dataclass
class EpochAnswer:
    """The latest epoch within tolerance; ``frame()`` for notebooks, :mod:`periodscan.views.
    onset` for words and JSON. ``reference`` is the onset-0 row of an onset sweep."""

    sweep: str
    judged: str
    tolerance: float
    confidence: float
    schedule_epochs: int
    production_epochs: int | None
    rows: list[EpochRow]
    reference: EpochRow | None = None
    latest: int | None = None
    facts: list[Fact] = field(default_factory=list)

    def frame(self) -> pd.DataFrame:
        """One row per judged epoch."""
        return pd.DataFrame([asdict(r) for r in self.rows])

    def epochs_with(self, *verdicts: str) -> list[int]:
        return [r.epoch for r in self.rows if r.verdict in verdicts]

    def blocking(self) -> EpochRow | None:
        """The earliest judged epoch not established within the tolerance."""
        return next((r for r in self.rows if r.verdict != SAFE), None)

    def production(self, epoch: float) -> float | None:
        """An epoch of this schedule mapped onto the production schedule, if one was given."""
        if self.production_epochs is None:
            return None
        return epoch * self.production_epochs / self.schedule_epochs


def question_of(table: pd.DataFrame, production_epochs: int | None, sweep: str):
    """(tolerance, confidence) of a table made with verdicts; refuse an empty one."""
    if table.empty:
        raise SweepError(f"sweep {sweep!r} has no finished runs yet; nothing to plan from")
    if "verdict" not in table:
        raise ValueError("the table needs verdicts: make it with a tolerance")
    tolerance, confidence = float(table.tolerance.iloc[0]), float(table.confidence.iloc[0])
    check_question(1, tolerance, confidence, production_epochs)
    return tolerance, confidence


def _row(epoch: int, r, judged, value: tuple[str, str, str, str]) -> EpochRow:
    """An EpochRow from a table row ``r`` and the row ``judged`` holding the verdict columns;
    ``value`` names the columns of the judged mean, its low and high bound and its seeds."""
    mean, low, high, seeds = value
    return EpochRow(
        epoch=int(epoch), seeds=int(getattr(r, seeds)), value=float(getattr(r, mean)),
        low=float(getattr(r, low)), high=float(getattr(r, high)),
        holm_low=float(judged.holm_low), holm_high=float(judged.holm_high),
        p_value=float(judged.p_value), p_holm=float(judged.p_holm),
        verdict=str(judged.verdict), more_seeds=float(judged.more_seeds),
        damage=float(r.damage), damage_low=float(r.damage_low),
        damage_high=float(r.damage_high), damage_verdict=str(r.verdict),
        recovery_epochs=int(r.recovery_epochs), short_recovery=bool(r.short_recovery),
        diverged=int(r.diverged), lost=int(r.failed) + int(r.unfinished))


def onset_plan(table: pd.DataFrame, runs: pd.DataFrame, *, schedule_epochs: int,
               sweep: str = "", production_epochs: int | None = None) -> EpochAnswer:
    """The latest onset whose delay cost is established below the tolerance.

    ``table`` is the onset design's table (with verdicts and delay columns), ``runs`` the runs
    it rests on (the per-seed delay costs are recomputed from them for the tests).
    """
    tolerance, confidence = question_of(table, production_epochs, sweep)
    table = table.sort_values("start").reset_index(drop=True)
    later = table[table.start > 0].reset_index(drop=True)
    costs = delay_costs(runs)
    keys = {(int(s), int(n)): costs.get(int(s), np.array([]))
            for s, n in zip(later.start, later.length, strict=True)}
    judged = add_verdicts(later[["start", "length"]], keys, tolerance, confidence, "all",
                          sd_floor=resolution(runs))
    columns = ("delay_cost", "delay_low", "delay_high", "delay_seeds")
    rows = [_row(r.start, r, j, columns) for r, j in zip(
        later.itertuples(), judged.itertuples(), strict=True)]
    first = table[table.start == 0]
    reference = None
    if len(first):
        r = next(first.itertuples())
        reference = _row(0, r, r, ("damage", "damage_low", "damage_high", "seeds"))
    answer = EpochAnswer(sweep, DELAY_COST, tolerance, confidence, schedule_epochs,
                         production_epochs, rows, reference)
    return finish(answer, budget="fixed_total", recovery_epochs=None)


def removal_plan(table: pd.DataFrame, *, schedule_epochs: int, sweep: str = "",
                 production_epochs: int | None = None, budget: str = "fixed_total",
                 recovery_epochs: int | None = None) -> EpochAnswer:
    """The latest epoch a deficit from epoch 0 may last to with damage below the tolerance."""
    tolerance, confidence = question_of(table, production_epochs, sweep)
    table = table.assign(until=table.start + table.length).sort_values("until")
    columns = ("damage", "damage_low", "damage_high", "seeds")
    rows = [_row(r.until, r, r, columns) for r in table.itertuples()]
    answer = EpochAnswer(sweep, DAMAGE, tolerance, confidence, schedule_epochs,
                         production_epochs, rows)
    return finish(answer, budget=budget, recovery_epochs=recovery_epochs)


def latest_within(rows: list[EpochRow]) -> int | None:
    """The latest epoch of the leading stretch of rows established within the tolerance."""
    latest = None
    for row in rows:
        if row.verdict != SAFE:
            break
        latest = row.epoch
    return latest


def finish(answer: EpochAnswer, *, budget: str, recovery_epochs: int | None) -> EpochAnswer:
    """Fill in the latest epoch and the facts a reader must be told beside it."""
    answer.latest = latest_within(answer.rows)
    rows, facts = answer.rows, []
    if answer.judged == DELAY_COST and (answer.reference is None or answer.reference.seeds == 0):
        facts.append(Fact(NO_REFERENCE))
    blocked = answer.blocking()
    after = tuple(r.epoch for r in rows if blocked and r.epoch > blocked.epoch
                  and r.verdict == SAFE)
    if after:
        facts.append(Fact(LATER_WITHIN, starts=after))
    short = tuple(r.epoch for r in rows if r.short_recovery)
    if short:
        facts.append(Fact(SHORT_RECOVERY, starts=short))
    if answer.production_epochs is not None:
        facts.append(Fact(PRODUCTION_MAPPING))
    if budget == "fixed_recovery":
        facts.append(Fact(FIXED_RECOVERY, count=recovery_epochs))
    counted = [*rows, *([answer.reference] if answer.reference else [])]
    for code, count in ((RUNS_LOST, sum(r.lost for r in counted)),
                        (RUNS_DIVERGED, sum(r.diverged for r in counted))):
        if count:
            facts.append(Fact(code, count=count))
    open_rows = [r for r in rows if r.verdict not in (SAFE, CRITICAL)]
    if open_rows:
        worst = max((r.more_seeds for r in open_rows if not math.isnan(r.more_seeds)),
                    default=math.nan)
        facts.append(Fact(UNDETERMINED, count=len(open_rows), seeds=worst))
    answer.facts = [*facts, Fact(METHOD, count=len(rows)), Fact(PROXY)]
    return answer
