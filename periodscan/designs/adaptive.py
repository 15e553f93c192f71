"""``design=adaptive``: find the edges of the critical window with as few runs as possible.

For one deficit length and the sweep's tolerance it searches the grid of candidate starts
(``first_start .. last_start`` every ``resolution`` epochs) for its two edges: the latest
critical start and the earliest start from which every later start is safe. Each round is a set of
runs trained by the ordinary sweep job in the same folder (runs, trunks and checkpoints of
earlier rounds are reused, and each run is the very run a full grid would train: exact
branching). The search itself is in :mod:`periodscan.designs.adaptive_search`.

* Verdicts are only taken at the seed cap (``seeds_max``): stopping a start as soon as its
  interval clears the tolerance (optional stopping) inflates the error rate of a fixed-level
  test, so every verdict rests on the same fixed number of seeds. Holm's correction counts the
  whole candidate grid, the starts not measured at the cap entering with p = 1: the adaptive
  design is never bolder than the full grid would be with the same seeds.
* New starts are first measured with ``seeds_initial`` seeds. That interim mean only steers the
  search (a *screen*): a start whose interim mean damage is at most the tolerance is taken as
  not critical, one whose mean is at least the tolerance as not safe, without more seeds. Every
  other start the search stands on is raised to the cap.
* Critical edge: the latest start that is critical at the cap or, uncapped, has an interim mean
  above the tolerance is raised to the cap; once it is critical, the midpoint between it and
  the next measured start is measured, until the two are ``resolution`` apart and both capped.
* Safe edge: the last candidate start is raised to the cap; if it is not safe there is no safe
  stretch. Otherwise every measured start after the latest start that is not safe (at the cap or
  by the screen) is raised to the cap, and the gap before the earliest of them is bisected the
  same way.

So seeds are added only where the boundary is decided, and starts the screen settles keep
``seeds_initial`` seeds and are reported undetermined ("not confirmed").

The screen can mislead where the interim mean falls on the wrong side of the tolerance: a start
that would be critical at the cap but had an unlucky first few seeds. The closer a start's
damage is to the tolerance, the likelier that is; ``benchmarks/adaptive_vs_grid.py`` counts
how often it happens on real grids. The search also assumes the damage changes monotonically
between the starts it measured: a critical stretch narrower than ``initial_step`` between two
harmless coarse starts is missed. Choose ``initial_step`` below the narrowest stretch you care
about.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any, ClassVar

import pandas as pd

from periodscan.analysis.sensitivity import TableOptions, sensitivity_table
from periodscan.analysis.verdicts import UNDETERMINED
from periodscan.designs.adaptive_search import boundaries, coarse, grid, next_round
from periodscan.designs.base import Design, Measured
from periodscan.engine.tree import RunSpec, baseline
from periodscan.params import COUNT, EPOCH, TOLERANCE, Interval, Options, bad_value, check_value

#: Ledger meta key older versions stored the seeds per start under.
LEGACY_STATE_KEY = "adaptive_seeds"


@dataclass(frozen=True)
class Settings:
    """The adaptive block with defaults resolved and cross-field rules checked."""

    length: int
    resolution: int
    step: int
    first: int
    last: int
    seeds_initial: int
    seeds_max: int
    max_rounds: int
    tolerance: float
    epochs: int

    def as_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


def settings_of(block: dict[str, Any], epochs: int, tolerance: Any) -> Settings:
    """Resolve defaults and check the rules that tie fields together."""
    length = block["length"]
    if length > epochs:
        raise bad_value("design.length", f"an int in the range [1, {epochs}] "
                        "(schedule.epochs)", length)
    resolution, step = block.get("resolution") or 1, block.get("initial_step") or 8
    if step % resolution:
        raise bad_value("design.initial_step", f"a multiple of design.resolution ({resolution})",
                        step)
    first = block.get("first_start") or 0
    # Default: the latest start that still leaves a tenth of the schedule to recover (the
    # short_recovery rule of the sensitivity table), so the edge is not set by unfinished
    # recovery at the very end.
    last = block.get("last_start")
    last = max(first, epochs - length - math.ceil(epochs / 10)) if last is None else last
    if not first <= last <= epochs - length:
        raise bad_value("design.last_start", f"an int in the range [{first}, {epochs - length}] "
                        f"(design.first_start to the last start whose window ends by epoch "
                        f"{epochs})", last)
    seeds_initial = block.get("seeds_initial") or 3
    seeds_max = block.get("seeds_max") or 8
    if seeds_max < seeds_initial:
        raise bad_value("design.seeds_max", f"an int >= design.seeds_initial ({seeds_initial})",
                        seeds_max)
    check_value("tolerance", tolerance, [TOLERANCE])
    return Settings(length, resolution, step, first, last, seeds_initial, seeds_max,
                    block.get("max_rounds") or 16, float(tolerance), epochs)



class AdaptiveDesign(Design):
    """Bisect toward both edges of the critical window of one deficit length."""

    kind: ClassVar[str] = "adaptive"
    more_rounds: ClassVar[bool] = True
    fields: ClassVar[dict] = {
        "length": [COUNT],
        "resolution": [COUNT, None],
        "initial_step": [COUNT, None],
        "first_start": [EPOCH, None],
        "last_start": [EPOCH, None],
        "seeds_initial": [Interval(int, 2, None), None],
        "seeds_max": [Interval(int, 2, None), None],
        "max_rounds": [COUNT, None],
        "budget": [Options(("fixed_total",)), None],
        "recovery_epochs": [None],
    }

    def __init__(self, plain: dict[str, Any], seeds: list[int], state: Any = None):
        super().__init__(plain, seeds, state)
        self.settings = settings_of(self.block, self.epochs, self.tolerance)
        self.seeds_per_start = _seeds_from_state(state)
        self.history: list[str] = []

    # --- what to train ----------------------------------------------------------------
    def preview(self) -> list[RunSpec]:
        s = self.settings
        return self._runs({st: s.seeds_initial for st in coarse(s.first, s.last, s.step)})

    def rounds(self, measured: Measured) -> Iterator[list[RunSpec]]:
        s = self.settings
        self.seeds_per_start = {st: s.seeds_initial for st in coarse(s.first, s.last, s.step)}
        for number in range(1, s.max_rounds + 1):
            yield self._runs(self.seeds_per_start)
            table = self.table(measured(), self.confidence, s.tolerance)
            todo = next_round(table, self.seeds_per_start, s.as_dict())
            counts = ", ".join(f"{st}:{n}" for st, n in sorted(self.seeds_per_start.items()))
            self.history.append(f"round {number}: starts:seeds {counts}; next {todo or 'none'}")
            if not todo:
                break
            if number == s.max_rounds:
                self.history.append(f"stopped after design.max_rounds={s.max_rounds} rounds; "
                                    "the boundary may not be settled")
                break
            self.seeds_per_start.update(todo)
        self.last_table = table

    def _runs(self, seeds: dict[int, int]) -> list[RunSpec]:
        s = self.settings
        runs = [RunSpec(seed=seed, start=start, length=s.length, end=s.epochs)
                for start, n in seeds.items() for seed in range(n)]
        return runs + [baseline(seed, s.epochs) for seed in range(max(seeds.values()))]

    # --- reading back -----------------------------------------------------------------
    def runs_used(self, runs: pd.DataFrame) -> pd.DataFrame:
        """Baselines up to the seed cap, each start at its seed count (all runs if unknown)."""
        s, seeds = self.settings, self.seeds_per_start
        if seeds is None:  # stopped before its first round was recorded
            return runs[runs.end_epoch == s.epochs]
        used = [(r.is_baseline == 1 and r.seed < s.seeds_max) or
                (r.length == s.length and int(r.start_epoch) in seeds
                 and r.seed < seeds[int(r.start_epoch)])
                for r in runs.itertuples()]
        return runs[pd.Series(used, index=runs.index, dtype=bool)
                    & (runs.end_epoch == s.epochs)]

    def table(self, runs: pd.DataFrame, confidence: float, tolerance: float | None,
              mcnemar: pd.DataFrame | None = None, *,
              num_classes: int | None = None) -> pd.DataFrame:
        """Verdicts only for starts at the seed cap, Holm padded to the whole candidate grid."""
        tolerance = self.settings.tolerance if tolerance is None else float(tolerance)
        if self.seeds_per_start is None:
            return super().table(runs, confidence, tolerance, mcnemar, num_classes=num_classes)
        options = TableOptions(confidence=confidence, tolerance=tolerance,
                               family_size=self.holm_family_size(), num_classes=num_classes)
        return adaptive_table(self.runs_used(runs), self.settings, self.seeds_per_start,
                              options)

    def holm_family_size(self) -> int | None:
        s = self.settings
        return len(grid(s.first, s.last, s.resolution)) if self.seeds_per_start else None

    def state(self) -> Any:
        if self.seeds_per_start is None:
            return None
        return {"seeds_per_start": {str(s): int(n)
                                    for s, n in sorted(self.seeds_per_start.items())}}

    @classmethod
    def state_from_meta(cls, meta: dict[str, Any]) -> Any:
        return super().state_from_meta(meta) or meta.get(LEGACY_STATE_KEY)

    def notes(self) -> list[str]:
        lines = list(self.history)
        table = getattr(self, "last_table", None)
        if table is not None and len(table):
            edge, safe = boundaries(table)
            lines.append(
                f"{self.settings.length}-epoch deficit at a tolerance of "
                f"{self.settings.tolerance:g} points: latest critical start "
                f"{edge if edge is not None else 'none'}; every start from "
                f"{safe if safe is not None else '(none found)'} on is safe")
        return lines

    def summary(self) -> str:
        s = self.settings
        return (f"adaptive: {s.length}-epoch deficit, starts {s.first} to {s.last} every "
                f"{s.resolution} (first pass every {s.step}), {s.seeds_initial} to "
                f"{s.seeds_max} seeds")


def _seeds_from_state(state: Any) -> dict[int, int] | None:
    """Seeds per start from a stored state (also the flat map older versions stored)."""
    if not state:
        return None
    raw = state.get("seeds_per_start", state) if isinstance(state, dict) else None
    return {int(s): int(n) for s, n in raw.items()} if raw else None


def adaptive_table(mine: pd.DataFrame, settings: Settings, seeds: dict[int, int],
                   options: TableOptions) -> pd.DataFrame:
    """Capped starts with verdicts; the others with their estimate, undetermined, unconfirmed."""
    cap = settings.seeds_max
    capped = {s for s, n in seeds.items() if n >= cap}
    is_capped = mine.start_epoch.isin(list(capped))
    parts = []
    if capped:
        part = sensitivity_table(mine[(mine.is_baseline == 1) | is_capped], settings.epochs,
                                 options)
        parts.append(part.assign(confirmed=True))
    if len(capped) < len(seeds):
        part = sensitivity_table(mine[(mine.is_baseline == 1) | ~is_capped], settings.epochs,
                                 options)
        for column in ("p_holm", "holm_low", "holm_high"):
            part[column] = float("nan")
        part["verdict"] = UNDETERMINED
        part["more_seeds"] = [cap - n for n in part.seeds]
        parts.append(part.assign(confirmed=False))
    if not parts:
        return pd.DataFrame()
    table = pd.concat(parts, ignore_index=True)
    return table.sort_values("start").reset_index(drop=True)


DESIGN = AdaptiveDesign
