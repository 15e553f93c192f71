"""``design=sequential``: where a deficit of one length is critical, with seeds added in stages.

The cheapest way this project has to answer the planning question. Three savings together:

* **Starts by bisection.** Starts are measured every ``initial_step`` epochs first, then halfway
  between measured starts whose answers differ, down to ``resolution`` epochs
  (:mod:`periodscan.designs.staged_search`). Starts between two measured starts with the same
  answer are not trained; the plan says they are implied.
* **Severity by bisection.** With ``design.severity`` each start is measured at its middle
  level first, then at the middle of the levels its verdict leaves open: a binary search, at
  most log2(levels + 1) levels (rounded up) while every level it measures is decided, both
  sides of a level left undetermined. ``design.level_search=ends`` measures the mildest and
  most severe level first instead.
* **Seeds in stages.** Every window measured gets ``stages[0]`` seeds, then the next stage each
  round until it is decided, stopped for futility, or at the cap (the last stage). Verdicts come
  from group-sequential t tests with an alpha-spending function, alpha shared over the whole
  grid of candidate starts (:mod:`periodscan.analysis.staged_verdicts`; by default along the
  bisection, ``design.alpha_passing``, at the severity levels measured first at every start,
  and by Holm at the others), so deciding a clear window after a few seeds keeps the error rate
  at the confidence level.

Every run is the run a full grid would train (exact branching); rounds share one folder.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import replace
from typing import Any, ClassVar

import numpy as np
import pandas as pd

from periodscan.analysis import planner
from periodscan.analysis.alpha_graph import AlphaGraph
from periodscan.analysis.planner import Fact
from periodscan.analysis.sensitivity import TableOptions, resolution, sensitivity_table
from periodscan.analysis.sequential import SPENDING, Stages
from periodscan.analysis.staged_verdicts import (
    DECIDED,
    FUTILE,
    OPEN,
    StagedRule,
    add_staged_verdicts,
    seed_damages,
)
from periodscan.analysis.variant_plan import PlanSettings, variant_plan
from periodscan.analysis.variants import variant_table
from periodscan.analysis.verdicts import CRITICAL, SAFE
from periodscan.designs.base import Design, Measured
from periodscan.designs.layout import WINDOW
from periodscan.designs.staged_search import (
    LEVEL_SEARCH,
    Known,
    bisection_graph,
    first_levels,
    implied_labels,
    known_cell,
    next_seeds,
)
from periodscan.designs.variants import SEVERITY_BLOCK, variants_summary
from periodscan.engine.tree import RunSpec, baseline
from periodscan.params import COUNT, EPOCH, Interval, ListOf, Options, bad_value

#: How the level is shared over the candidate starts: ``even`` (Holm: every candidate start an
#: equal share, a decided one passing its share evenly to the rest) or ``bisection`` (the starts
#: of the first pass share it, a decided start passes it to the starts bisection measures next
#: beside it; :func:`periodscan.designs.staged_search.bisection_graph`).
PASSING = ("even", "bisection")

#: With the bisection's shares each start's bounds are its t interval at the level it holds.
BISECTION_BOUNDS = "bounds at level"

STAGES = ListOf(Interval(int, 2, None), distinct=True,
                words="a non-empty list of increasing seed counts (ints >= 2), "
                      "e.g. [3, 5, 8, 12, 16]")


class SequentialDesign(Design):
    """Bisect over starts (and severity levels), add seeds in stages, stop each window early."""

    kind: ClassVar[str] = "sequential"
    more_rounds: ClassVar[bool] = True
    layout: ClassVar = replace(WINDOW, family_words="every candidate start, in its "
                               "group-sequential form (seeds added in stages)")
    fields: ClassVar[dict] = {
        "length": [COUNT],
        "resolution": [COUNT],
        "initial_step": [COUNT],
        "first_start": [EPOCH],
        "last_start": [EPOCH, None],
        "stages": [STAGES],
        "spending": [Options(SPENDING)],
        "futility": [Interval(float, 0.0, 1.0, closed="left")],
        "alpha_passing": [Options(PASSING), None],  # None (a sweep from before it existed): even
        "level_search": [Options(LEVEL_SEARCH), None],  # None (likewise): ends
        "max_rounds": [COUNT],
        "severity": [SEVERITY_BLOCK, None],
        "deficits": [None],
    }

    def __init__(self, plain: dict[str, Any], seeds: list[int], state: Any = None):
        super().__init__(plain, seeds, state)
        self._check_block()
        self.order = seed_order(self.seeds, self.stages.cap)
        self.place = {seed: i for i, seed in enumerate(self.order)}
        self.cells = _cells_from_state(state)
        self.futile = _futile_from_state(state)
        self.history: list[str] = []

    def _check_block(self) -> None:
        b = self.block
        self.length = b["length"]
        if self.length > self.epochs:
            raise bad_value("design.length", f"an int in the range [1, {self.epochs}] "
                            "(schedule.epochs)", self.length)
        self.resolution, self.step = b["resolution"], b["initial_step"]
        self.first = b["first_start"]
        if self.step % self.resolution:
            raise bad_value("design.initial_step", f"a multiple of design.resolution "
                            f"({self.resolution})", self.step)
        last = b.get("last_start")
        self.last = (max(self.first, self.epochs - self.length - math.ceil(self.epochs / 10))
                     if last is None else last)
        if not self.first <= self.last <= self.epochs - self.length:
            raise bad_value("design.last_start", f"an int in the range [{self.first}, "
                            f"{self.epochs - self.length}] (design.first_start to the last start "
                            f"whose window ends by epoch {self.epochs})", last)
        # on the grid of candidate starts: first_start + a multiple of the resolution
        self.last -= (self.last - self.first) % self.resolution
        if list(b["stages"]) != sorted(b["stages"]):
            raise bad_value("design.stages", str(STAGES), b["stages"])
        self.stages = Stages(tuple(int(n) for n in b["stages"]), b["spending"])
        self.check_levels(self.confidence)
        if self.passing == "bisection":
            shared = [self.key_of(v) for v in range(self.level_count()) if self.shares_level(v)]
            where = ("" if len(shared) == self.level_count() else
                     f" at level{'s' if len(shared) > 1 else ''} {', '.join(shared)}, "
                     "measured first at every start; Holm at the other levels")
            self.layout = replace(self.layout, correction="corrected (alpha held by the first "
                                  f"pass's starts, passed on along the bisection{where}) over",
                                  bounds_title=BISECTION_BOUNDS)

    def check_levels(self, confidence: float) -> None:
        """Passing shares on needs each look's level to grow with alpha; O'Brien-Fleming-type
        spending stops doing so at large alpha (about 0.35 for stages 3, 5, 8, 12, 16)."""
        alpha = 1.0 - confidence
        shares = np.union1d(np.geomspace(alpha / 4000, alpha / 40, 20),
                            np.linspace(alpha / 40, alpha, 40))
        levels = [self.stages.levels(a) for a in shares]
        if any(np.any(b < a) for a, b in zip(levels[:-1], levels[1:], strict=True)):
            raise bad_value("confidence", f"a higher confidence with design.spending="
                            f"{self.stages.kind} and these stages (its looks' levels stop "
                            "growing with alpha), e.g. 0.9 or 0.95", confidence)

    # --- the grid -----------------------------------------------------------------------
    def grid(self) -> list[int]:
        """Every candidate start: the multiple-test family of each variant."""
        return list(range(self.first, self.last + 1, self.resolution))

    def coarse(self) -> list[int]:
        starts = list(range(self.first, self.last + 1, self.step))
        return starts if starts[-1] == self.last else [*starts, self.last]

    def level_count(self) -> int:
        return max(len(self.variants), 1)

    def key_of(self, level: int) -> str:
        return self.variants[level].key if self.variants else ""

    # --- what to train ----------------------------------------------------------------
    def _first_cells(self) -> dict[tuple[int, int], int]:
        """The first round: coarse starts at the levels the level search measures first."""
        return {(s, v): self.stages.seeds[0] for s in self.coarse()
                for v in first_levels(self.level_count(), self.level_search)}

    def preview(self) -> list[RunSpec]:
        return self._runs(self._first_cells())

    def rounds(self, measured: Measured) -> Iterator[list[RunSpec]]:
        self.cells = self._first_cells()
        self.futile = set()
        for number in range(1, int(self.block["max_rounds"]) + 1):
            yield self._runs(self.cells)
            table = self.table(measured(), self.confidence, self.tolerance)
            self.futile |= {c for c, k in self.stops(table).items() if k == FUTILE}
            todo = self.next_round(table)
            self.history.append(f"round {number}: {self._progress(table)}; "
                                f"next: {len(todo)} window(s)" if todo else
                                f"round {number}: {self._progress(table)}; settled")
            if not todo:
                break
            if number == int(self.block["max_rounds"]):
                self.history.append(f"stopped after design.max_rounds={number} rounds; some "
                                    "windows are still open")
                break
            self.cells.update(todo)
        self.last_table = table

    def next_round(self, table: pd.DataFrame) -> dict[tuple[int, int], int]:
        """Seeds per cell for the next round: open cells to their next stage, new cells."""
        return next_seeds(self.cells, self.known(table), self.stages, self.level_count(),
                          self.resolution, self.level_search)

    def cell_of(self, row: Any) -> tuple[int, int]:
        """(start, level index) of a table row."""
        levels = {self.key_of(v): v for v in range(self.level_count())}
        return int(row.start), levels[str(getattr(row, "variant", ""))]

    def stops(self, table: pd.DataFrame) -> dict[tuple[int, int], str]:
        """Why each measured cell gets no more seeds (``open`` when it still may)."""
        return {self.cell_of(row): row.stopped for row in table.itertuples()}

    def known(self, table: pd.DataFrame) -> dict[tuple[int, int], Known]:
        """What the search knows about each measured cell (:func:`staged_search.known_cell`)."""
        return {self.cell_of(row): known_cell(row.verdict, row.stopped, row.damage,
                                              self.tolerance) for row in table.itertuples()}

    def _progress(self, table: pd.DataFrame) -> str:
        counts = table.stopped.value_counts().to_dict() if len(table) else {}
        seeds = sum(self.cells.values())
        return (f"{len(self.cells)} window(s), {seeds} window-seeds; "
                + ", ".join(f"{n} {k}" for k, n in sorted(counts.items())))

    def _runs(self, cells: dict[tuple[int, int], int]) -> list[RunSpec]:
        runs = [RunSpec(seed=seed, start=start, length=self.length, end=self.epochs,
                        variant=self.key_of(level))
                for (start, level), n in sorted(cells.items()) for seed in self.order[:n]]
        return runs + [baseline(seed, self.epochs) for seed in self.order[:max(cells.values())]]

    # --- reading back -----------------------------------------------------------------
    def runs_used(self, runs: pd.DataFrame) -> pd.DataFrame:
        """Baselines up to the most seeds any window has; each window at its own seeds."""
        if not self.cells:
            return runs[runs.end_epoch == self.epochs]
        keys = {self.key_of(v): v for v in range(self.level_count())}
        most = max(self.cells.values())
        variant = runs.variant if "variant" in runs else pd.Series("", index=runs.index)
        place = [self.place.get(int(seed), len(self.order)) for seed in runs.seed]
        used = [(r.is_baseline == 1 and i < most) or (
            r.length == self.length and str(v) in keys
            and i < self.cells.get((int(r.start_epoch), keys[str(v)]), 0))
            for r, v, i in zip(runs.itertuples(), variant, place, strict=True)]
        return runs[pd.Series(used, index=runs.index, dtype=bool)
                    & (runs.end_epoch == self.epochs)]

    def table(self, runs: pd.DataFrame, confidence: float, tolerance: float | None,
              mcnemar: pd.DataFrame | None = None, *,
              num_classes: int | None = None) -> pd.DataFrame:
        """The measured windows with group-sequential verdicts (alpha shared over the whole
        grid)."""
        mine = self.runs_used(runs)
        options = TableOptions(confidence=confidence, num_classes=num_classes)
        if self.variants:
            table = variant_table(mine, self.epochs, options, mcnemar, self.variant_columns())
        else:
            table = sensitivity_table(mine, self.epochs, options, mcnemar)
        if tolerance is None or table.empty:
            return table
        self.check_levels(confidence)
        graph = self.alpha_graph()
        rule = StagedRule(stages=self.stages, tolerance=float(tolerance), confidence=confidence,
                          futility=float(self.block["futility"]),
                          family_size=self.holm_family_size(), sd_floor=resolution(mine),
                          graph=graph, family=tuple(self.grid()),
                          variant_graphs=self.level_graphs(graph))
        table = add_staged_verdicts(table, seed_damages(mine, self.order), rule)
        # Futility is sticky: a window stopped for it gets no more seeds, even if a later
        # round's recycled share of alpha would raise its conditional power again.
        sticky = [self.cell_of(r) in self.futile and r.stopped == OPEN
                  for r in table.itertuples()]
        table.loc[pd.Series(sticky, index=table.index, dtype=bool), "stopped"] = FUTILE
        return table

    def holm_family_size(self) -> int | None:
        return len(self.grid())

    @property
    def passing(self) -> str:
        return self.block.get("alpha_passing") or "even"

    @property
    def level_search(self) -> str:
        """How each start's threshold level is searched (``staged_search.LEVEL_SEARCH``)."""
        return self.block.get("level_search") or "ends"

    def alpha_graph(self) -> AlphaGraph | None:
        """The shares of alpha over the grid's starts (None: Holm's even shares)."""
        if self.passing == "even":
            return None
        return bisection_graph(self.grid(), self.coarse(), self.resolution)

    def shares_level(self, level: int) -> bool:
        """Whether the bisection's shares apply at this level: only at the levels the search
        measures at every start it visits, where the first pass's starts are measured whatever
        the data. Elsewhere a start is measured only where other levels leave it open, so a
        share fixed on a first-pass start would often sit where the level is never measured:
        those levels share alpha evenly (Holm)."""
        return (self.passing == "bisection"
                and level in first_levels(self.level_count(), self.level_search))

    def level_graphs(self, graph: AlphaGraph | None) -> tuple[tuple[str, AlphaGraph | None], ...]:
        """Per level with severity levels: the bisection's ``graph`` or None (Holm)."""
        if not self.variants or graph is None:
            return ()
        return tuple((self.key_of(v), graph if self.shares_level(v) else None)
                     for v in range(self.level_count()))

    def implied(self, table: pd.DataFrame) -> dict[tuple[int, int], str]:
        """Verdict of every (grid start, level): measured, or implied by monotonicity."""
        verdicts = {self.cell_of(r): Known(label=r.verdict, settled=r.stopped != OPEN)
                    for r in table.itertuples()}
        return implied_labels(verdicts, self.level_count(), self.grid())

    def plan(self, runs: pd.DataFrame, table: pd.DataFrame, *, length: int | None = None,
             production_epochs: int | None = None, sweep: str = "") -> Any:
        """The window plan of each level, its critical and safe starts over the whole grid
        (implied starts included and named)."""
        if self.variants:
            settings = PlanSettings(schedule_epochs=self.epochs,
                                    production_epochs=production_epochs,
                                    holm_family=self.holm_family_size())
            labels = {v.key: v.label for v in self.variants}
            answer = variant_plan(runs, table, length, settings, sweep=sweep,
                                  axis=self.layout.variant_axis, labels=labels)
            measured = next(iter(answer.answers.values()))
            for level in range(self.level_count()):
                key = self.key_of(level)
                if key not in answer.answers:  # every verdict at this level implied
                    answer.answers[key] = replace(measured, sweep=f"{sweep}, {labels[key]}",
                                                  starts=[], best=None, best_is_safe=False,
                                                  facts=measured.facts[-1:])
                self._fill(answer.answers[key], table, level)
            answer.answers = {k: answer.answers[k] for k in labels}
            answer.labels = dict(labels)
            return answer
        answer = super().plan(runs, table, length=length, production_epochs=production_epochs,
                              sweep=sweep)
        return self._fill(answer, table, 0)

    def _fill(self, answer: Any, table: pd.DataFrame, level: int) -> Any:
        """Critical, safe and undetermined starts and safe-from over the whole grid (implied
        starts included), and the facts of a group-sequential answer."""
        labels, grid = self.implied(table), self.grid()
        column = {s: labels[(s, level)] for s in grid}
        answer.critical_starts = [s for s in grid if column[s] == CRITICAL]
        answer.safe_starts = [s for s in grid if column[s] == SAFE]
        answer.undetermined_starts = [s for s in grid if column[s] not in (CRITICAL, SAFE)]
        answer.safe_from = None
        for start in grid[::-1]:
            if column[start] != SAFE:
                break
            answer.safe_from = start
        measured = {s.start for s in answer.starts}
        implied = tuple(s for s in answer.critical_starts + answer.safe_starts
                        if s not in measured)
        futile = tuple(sorted(self.cell_of(r)[0] for r in table.itertuples()
                              if r.stopped == FUTILE and self.cell_of(r)[1] == level))
        # The fixed-sample "more seeds" estimate counts measured starts only and assumes the
        # same seeds are tested again; a staged answer points to fresh seeds instead.
        facts = [f for f in answer.facts if f.code not in (planner.METHOD, planner.UNDETERMINED)]
        extra = [Fact(planner.IMPLIED, starts=tuple(sorted(implied)))] if implied else []
        extra += [Fact(planner.FUTILE, starts=futile)] if futile else []
        if answer.undetermined_starts:
            extra.append(Fact(planner.FRESH_SEEDS, starts=tuple(answer.undetermined_starts),
                              count=max(self.order) + 1, seeds=self.stages.cap))
        extra.append(Fact(planner.SEQUENTIAL, count=self.holm_family_size(),
                          seeds=self.stages.cap,
                          starts=tuple(self.coarse()) if self.shares_level(level) else ()))
        answer.facts = facts[:-1] + extra + facts[-1:]  # the proxy caveat stays last
        # The bound over all windows is a fixed-sample one; after data-dependent stopping it
        # would claim more than it holds, so a staged answer does not state it.
        answer.established = None
        answer.bounds_title = self.layout.bounds_title
        return answer

    # --- state --------------------------------------------------------------------------
    def state(self) -> Any:
        state = dict(super().state() or {})
        if self.cells:
            state["cells"] = {f"{s}|{v}": int(n) for (s, v), n in sorted(self.cells.items())}
        if self.futile:
            state["futile"] = [f"{s}|{v}" for s, v in sorted(self.futile)]
        return state or None

    def notes(self) -> list[str]:
        lines = list(self.history)
        table = getattr(self, "last_table", None)
        if table is not None and len(table):
            decided = table[table.stopped == DECIDED]
            lines.append(f"{len(decided)} of {len(table)} windows decided; "
                         f"{sum(self.cells.values())} window-seeds of a full grid's "
                         f"{len(self.grid()) * self.level_count() * self.stages.cap}")
        return lines

    def summary(self) -> str:
        return (f"sequential: {self.length}-epoch deficit, starts {self.first} to {self.last} "
                f"every {self.resolution} (first pass every {self.step}), seeds in stages "
                f"{list(self.stages.seeds)} ({self.stages.kind} spending)"
                + variants_summary(self.variants))


def seed_order(seeds: list[int], count: int) -> list[int]:
    """The ``count`` seeds a staged design adds, in order: the configured ones, then the numbers
    after the largest when its stages need more (``seeds=10`` and a cap of 16: seeds 0..15;
    ``seeds=[16,...,31]``: those, for a second look on seeds not yet used)."""
    more = range(max(seeds, default=-1) + 1, max(seeds, default=-1) + 1 + count)
    return [*seeds, *more][:count]


def _cells_from_state(state: Any) -> dict[tuple[int, int], int]:
    raw = state.get("cells") if isinstance(state, dict) else None
    if not raw:
        return {}
    return {(int(k.split("|")[0]), int(k.split("|")[1])): int(n) for k, n in raw.items()}


def _futile_from_state(state: Any) -> set[tuple[int, int]]:
    raw = state.get("futile") if isinstance(state, dict) else None
    return {(int(k.split("|")[0]), int(k.split("|")[1])) for k in raw or []}


DESIGN = SequentialDesign
