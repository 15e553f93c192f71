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

import json
import math
from dataclasses import asdict, dataclass, field
from typing import Any

import pandas as pd

from periodscan.analysis.stats import SETTLE_CAP
from periodscan.analysis.verdicts import CRITICAL, SAFE, describe_more_seeds
from periodscan.errors import SweepError, bad_value

PROXY_CAVEAT = ("Damage measured on a small proxy model is evidence, not a guarantee, for a "
                "production model: confirm on the real pipeline before relying on it.")


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
    diverged: int = 0
    failed: int = 0
    unfinished: int = 0
    confirmed: bool = True  # False: an adaptive design screened it on its first seeds


@dataclass
class PlanAnswer:
    """The planner's answer; ``to_dict`` / ``to_json`` for scripts, ``frame`` for notebooks."""

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
    notes: list[str] = field(default_factory=list)

    def frame(self) -> pd.DataFrame:
        """One row per measured start."""
        return pd.DataFrame([asdict(s) for s in self.starts])

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict: NaN becomes None, and a seed count beyond the search cap the
        string ``"more than 200"`` (see ``periodscan.analysis.stats.SETTLE_CAP``)."""
        return _json_ready(asdict(self))

    def to_json(self, indent: int | None = 2) -> str:
        return json.dumps(self.to_dict(), indent=indent)

    def critical_stretches(self) -> list[list[int]]:
        """Critical starts grouped into runs of neighbouring measured starts."""
        order = [s.start for s in self.starts]
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


def _json_ready(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_ready(v) for v in value]
    if isinstance(value, float):
        if math.isnan(value):
            return None
        if math.isinf(value):
            return f"more than {SETTLE_CAP}"
    if hasattr(value, "item"):  # numpy scalars
        return _json_ready(value.item())
    return value


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
        diverged=int(r.diverged), failed=int(r.failed), unfinished=int(r.unfinished),
        confirmed=bool(getattr(r, "confirmed", True)),
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
    answer.notes = _notes(answer, budget, recovery_epochs, holm_family)
    return answer


def _notes(a: PlanAnswer, budget: str, recovery_epochs: int | None,
           holm_family: int | None = None) -> list[str]:
    notes = []
    if not a.length_measured:
        last = a.starts[-1].start if a.starts else 0
        notes.append(
            f"A {a.length_asked}-epoch deficit was not measured; this answer uses the nearest "
            f"longer measured length, {a.length_used} epochs, assuming a longer deficit at the "
            f"same start does at least as much damage (conservative). Starts after epoch {last} "
            f"were not measured for it.")
    short = [s.start for s in a.starts if s.short_recovery]
    if short:
        notes.append(f"Start(s) {', '.join(map(str, short))} leave little clean training after "
                     "the deficit: their damage is partly a model that has not yet recovered, "
                     "which still matters if training is not extended.")
    if a.production_epochs is not None:
        notes.append(
            f"Production mapping: epoch e of this {a.schedule_epochs}-epoch proxy is shown as "
            f"epoch e x {a.production_epochs}/{a.schedule_epochs} of the production schedule, "
            f"and the {a.length_used}-epoch window as "
            f"{a.length_used * a.production_epochs / a.schedule_epochs:g} production epochs. "
            "This assumes sensitivity scales with the fraction of training completed.")
    if budget == "fixed_recovery":
        notes.append(f"Damage was measured after {recovery_epochs} clean epochs following each "
                     "window (fixed_recovery budget), not at the end of the schedule.")
    lost = sum(s.failed + s.unfinished for s in a.starts)
    if lost:
        notes.append(f"{lost} window run(s) failed or are unfinished; they are not in the "
                     "means and the seeds column shows what each answer rests on.")
    diverged = sum(s.diverged for s in a.starts)
    if diverged:
        notes.append(f"{diverged} window run(s) diverged; their final accuracy counts as damage.")
    screened = [s.start for s in a.starts if not s.confirmed]
    if screened:
        notes.append(f"Adaptive design: start(s) {', '.join(map(str, screened))} were screened "
                     "on their first seeds (their mean told the search which way to go) and "
                     "are not confirmed; only starts measured at the seed cap get verdicts, so "
                     "no data-dependent stopping enters a verdict. Starts between measured ones "
                     "are assumed to follow the measured trend.")
    open_rows = [s for s in a.starts if s.verdict not in (SAFE, CRITICAL) and s.confirmed]
    if open_rows:
        worst = max((s.more_seeds for s in open_rows if not math.isnan(s.more_seeds)),
                    default=math.nan)
        notes.append(f"{len(open_rows)} start(s) undetermined at this tolerance; settling all of "
                     f"them would likely take {describe_more_seeds(worst)}.")
    family = ("over the starts of this length" if holm_family is None else
              f"over all {holm_family} candidate starts of the adaptive grid (unmeasured ones "
              "count with p = 1)")
    notes.append(f"Verdicts: paired t test of mean damage against the tolerance, Holm-corrected "
                 f"{family}; safe = upper bound below tolerance, critical = lower bound above "
                 "it. Only measured starts are judged; starts in between are not.")
    notes.append(PROXY_CAVEAT)
    return notes
