"""Answer a maintenance question from a sweep: where may a deficit of L epochs go?

Given the sensitivity table with verdicts (see :mod:`periodscan.analysis.verdicts`), the planner
lists which window starts are safe, critical or undetermined for a deficit of ``length`` epochs at
the user's tolerance and confidence, the earliest start from which every later measured start is
safe, and the expected damage in the best safe slot.

When ``length`` was not measured, the answer comes from the nearest *longer* measured length: a
longer deficit starting at the same epoch contains the shorter one, so its damage is taken as an
upper bound (an assumption, stated in the answer). Starts can be mapped onto a longer production
schedule by their fraction of training, which assumes sensitivity scales with that fraction.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

import pandas as pd

from periodscan.analysis.established import Established, family_bound
from periodscan.analysis.recovery import Trend, trend_of
from periodscan.analysis.verdicts import CRITICAL, SAFE
from periodscan.errors import SweepError, bad_value

#: Codes of the facts a plan carries beside its numbers (phrased by periodscan.views.plan).
LENGTH_SUBSTITUTED = "length_substituted"  # answered from a longer measured length
SHORT_RECOVERY = "short_recovery"  # starts: little clean training after the deficit
PRODUCTION_MAPPING = "production_mapping"  # starts mapped onto a longer schedule
FIXED_RECOVERY = "fixed_recovery"  # count: clean epochs after each window (the budget)
RUNS_LOST = "runs_lost"  # count: failed or unfinished window runs, not in the means
RUNS_DIVERGED = "runs_diverged"  # count: diverged or at chance, counted in the means
BASELINES_DIVERGED = "baselines_diverged"  # starts: compared with a baseline at chance/diverged
SCREENED = "screened"  # starts: measured on their first seeds only, not confirmed
STILL_RECOVERING = "still_recovering"  # starts: the paired gap still falls at the end
UNDETERMINED = "undetermined"  # count: open starts; seeds: extra seeds to settle them all
METHOD = "method"  # count: Holm family size when padded beyond the measured starts
SEQUENTIAL = "sequential"  # count: candidate starts; seeds: the cap (replaces METHOD); starts:
#                            the first pass's, when they hold alpha (design.alpha_passing)
FUTILE = "futile"  # starts: stopped early, more seeds unlikely to decide them
IMPLIED = "implied"  # starts: not trained, verdict implied by the measured starts around them
FRESH_SEEDS = "fresh_seeds"  # starts: left open by a staged design; count: first unused seed;
#                              seeds: how many fresh seeds to take
PROXY = "proxy"  # the proxy-model caveat


@dataclass
class StartAnswer:
    """The verdict for one measured window start."""

    start: int
    start_frac: float
    production_start: float | None
    seeds: int
    damage: float
    damage_low: float
    damage_high: float
    holm_low: float
    holm_high: float
    verdict: str
    more_seeds: float  # NaN when decided, inf when beyond the search cap
    recovery_epochs: int = 0
    short_recovery: bool = False
    diverged: int = 0  # window runs that diverged or ended at chance level
    baseline_diverged: int = 0  # their baselines that did
    failed: int = 0
    unfinished: int = 0
    confirmed: bool = True  # False: an adaptive design screened it on its first seeds
    trend: Trend | None = None  # the gap's trend at the end (analysis/recovery.py), if read


@dataclass(frozen=True)
class Fact:
    """Something a reader of the answer must be told, as data; :mod:`periodscan.views.plan`
    phrases it. ``code`` is one of this module's fact codes; ``starts``, ``count`` and
    ``seeds`` carry its numbers where it has any."""

    code: str
    starts: tuple[int, ...] = ()
    count: int | None = None
    seeds: float | None = None


@dataclass
class PlanAnswer:
    """The planner's answer; ``frame`` for notebooks, ``periodscan.views.plan`` for words and
    JSON. ``facts`` lists what must be said beside the numbers."""

    sweep: str
    length_asked: int
    length_used: int
    length_measured: bool
    lengths_available: list[int]
    tolerance: float
    confidence: float
    schedule_epochs: int
    production_epochs: int | None
    starts: list[StartAnswer]
    safe_starts: list[int]
    critical_starts: list[int]
    undetermined_starts: list[int]
    safe_from: int | None
    best: StartAnswer | None
    best_is_safe: bool
    facts: list[Fact] = field(default_factory=list)
    #: Upper bound on damage at every start of this length (analysis/established.py).
    established: Established | None = None
    #: What the per-start bounds are: Holm-adjusted, or each start's interval at the level it
    #: holds (a sequential design sharing alpha along its search).
    bounds_title: str = "Holm bounds"

    def frame(self) -> pd.DataFrame:
        """One row per measured start."""
        return pd.DataFrame([asdict(s) for s in self.starts])

    def critical_stretches(self) -> list[list[int]]:
        """Critical starts grouped into runs of neighbouring starts: measured ones, and those a
        design answers without measuring (a sequential design's implied starts)."""
        order = sorted({s.start for s in self.starts}.union(
            self.critical_starts, self.safe_starts, self.undetermined_starts))
        groups: list[list[int]] = []
        for start in self.critical_starts:
            if groups and order.index(start) == order.index(groups[-1][-1]) + 1:
                groups[-1].append(start)
            else:
                groups.append([start])
        return groups

    def blocking_start(self) -> StartAnswer | None:
        """The latest measured start that is not safe (what keeps ``safe_from`` from earlier)."""
        later = [s for s in self.starts if s.verdict != SAFE]
        return later[-1] if later else None

    def production(self, epoch: float) -> float | None:
        """An epoch of the proxy schedule mapped onto the production schedule, if one was given."""
        if self.production_epochs is None:
            return None
        return epoch * self.production_epochs / self.schedule_epochs


def check_question(length: Any, tolerance: Any, confidence: Any,
                   production_epochs: Any) -> None:
    """Validate the planner's inputs at the boundary (field, allowed, got)."""
    if isinstance(length, bool) or not isinstance(length, int) or length < 1:
        raise bad_value("length", "an int >= 1 (epochs of deficit)", length)
    if isinstance(tolerance, bool) or not isinstance(tolerance, (int, float)) or not (
            math.isfinite(tolerance) and tolerance >= 0):
        raise bad_value("tolerance", "a number >= 0 (accuracy points)", tolerance)
    if isinstance(confidence, bool) or not isinstance(confidence, (int, float)) or not (
            0.5 <= confidence < 1):
        raise bad_value("confidence", "a number in [0.5, 1)", confidence)
    if production_epochs is not None and (isinstance(production_epochs, bool) or not isinstance(
            production_epochs, int) or production_epochs < 1):
        raise bad_value("production_epochs", "an int >= 1", production_epochs)


def choose_length(asked: int, measured: list[int]) -> int:
    """The asked length if measured, else the nearest longer measured one (conservative)."""
    if asked in measured:
        return asked
    longer = [n for n in measured if n > asked]
    if not longer:
        raise SweepError(
            f"The 'length' parameter must be at most the longest measured deficit length "
            f"({max(measured)}) so the answer can rest on a measured length; lengths in this "
            f"sweep: {measured}. Got {asked} instead. Measure it: add it to design.lengths "
            "and rerun the sweep")
    return min(longer)


def plan_from_table(table: pd.DataFrame, length: int, schedule_epochs: int,
                    production_epochs: int | None = None, *, sweep: str = "",
                    budget: str = "fixed_total", recovery_epochs: int | None = None,
                    holm_family: int | None = None) -> PlanAnswer:
    """Answer for a deficit of ``length`` epochs from a table made with a tolerance.

    ``holm_family``: the number of candidate starts Holm's correction counted when it is more
    than the starts in the table (an adaptive design pads it to its whole grid).
    """
    if table.empty:
        raise SweepError(f"sweep {sweep!r} has no finished window runs yet; nothing to plan from")
    if "verdict" not in table:
        raise ValueError("the table needs verdicts: make it with sensitivity_table(tolerance=...)")
    tolerance = float(table.tolerance.iloc[0])
    confidence = float(table.confidence.iloc[0])
    check_question(length, tolerance, confidence, production_epochs)
    measured = sorted(int(n) for n in table.length.unique())
    used = choose_length(length, measured)
    rows = table[table.length == used].sort_values("start")
    scale = None if production_epochs is None else production_epochs / schedule_epochs
    starts = [StartAnswer(
        start=int(r.start), start_frac=float(r.start_frac),
        production_start=None if scale is None else float(r.start) * scale,
        seeds=int(r.seeds), damage=float(r.damage), damage_low=float(r.damage_low),
        damage_high=float(r.damage_high), holm_low=float(r.holm_low),
        holm_high=float(r.holm_high), verdict=str(r.verdict), more_seeds=float(r.more_seeds),
        recovery_epochs=int(r.recovery_epochs), short_recovery=bool(r.short_recovery),
        diverged=int(r.diverged), baseline_diverged=int(r.baseline_diverged),
        failed=int(r.failed), unfinished=int(r.unfinished),
        confirmed=bool(getattr(r, "confirmed", True)), trend=trend_of(r),
    ) for r in rows.itertuples()]
    safe = [s.start for s in starts if s.verdict == SAFE]
    critical = [s.start for s in starts if s.verdict == CRITICAL]
    undetermined = [s.start for s in starts if s.verdict not in (SAFE, CRITICAL)]
    safe_from = None
    for s in reversed(starts):
        if s.verdict != SAFE:
            break
        safe_from = s.start
    safe_rows = [s for s in starts if s.verdict == SAFE]
    pool = safe_rows or [s for s in starts if math.isfinite(s.damage)]
    best = min(pool, key=lambda s: s.damage) if pool else None
    answer = PlanAnswer(sweep, length, used, used == length, measured, tolerance, confidence,
                        schedule_epochs, production_epochs, starts, safe, critical, undetermined,
                        safe_from, best, bool(safe_rows))
    answer.established = family_bound(rows, holm_family)
    answer.facts = plan_facts(answer, budget, recovery_epochs, holm_family)
    return answer


def plan_facts(a: PlanAnswer, budget: str, recovery_epochs: int | None,
               holm_family: int | None = None) -> list[Fact]:
    """What a reader must know beside the verdicts, in the order it is best told."""
    facts = []
    if not a.length_measured:
        facts.append(Fact(LENGTH_SUBSTITUTED, starts=(a.starts[-1].start if a.starts else 0,)))
    short = tuple(s.start for s in a.starts if s.short_recovery)
    if short:
        facts.append(Fact(SHORT_RECOVERY, starts=short))
    if a.production_epochs is not None:
        facts.append(Fact(PRODUCTION_MAPPING))
    if budget == "fixed_recovery":
        facts.append(Fact(FIXED_RECOVERY, count=recovery_epochs))
    lost = sum(s.failed + s.unfinished for s in a.starts)
    if lost:
        facts.append(Fact(RUNS_LOST, count=lost))
    diverged = sum(s.diverged for s in a.starts)
    if diverged:
        facts.append(Fact(RUNS_DIVERGED, count=diverged))
    shaky = tuple(s.start for s in a.starts if s.baseline_diverged)
    if shaky:
        facts.append(Fact(BASELINES_DIVERGED, starts=shaky))
    recovering = tuple(s.start for s in a.starts if s.trend and s.trend.still_recovering)
    if recovering:
        facts.append(Fact(STILL_RECOVERING, starts=recovering))
    screened = tuple(s.start for s in a.starts if not s.confirmed)
    if screened:
        facts.append(Fact(SCREENED, starts=screened))
    open_rows = [s for s in a.starts if s.verdict not in (SAFE, CRITICAL) and s.confirmed]
    if open_rows:
        worst = max((s.more_seeds for s in open_rows if not math.isnan(s.more_seeds)),
                    default=math.nan)
        facts.append(Fact(UNDETERMINED, count=len(open_rows), seeds=worst))
    return [*facts, Fact(METHOD, count=holm_family), Fact(PROXY)]
