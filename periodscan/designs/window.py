"""``design=window``: the deficit on during ``[start, start + length)`` for every start x length.

One length gives a sensitivity curve, several give a start x length grid; either way the runs of
a seed form one tree of shared segments. Holm's correction runs over the windows of one length,
the windows that answer one planning question. ``design.severity`` or ``design.deficits`` trains
every window with several deficit variants on the same trunk (:mod:`periodscan.designs.variants`);
Holm then runs over the windows of one length and one variant.
"""

from __future__ import annotations

from typing import Any, ClassVar

import pandas as pd

from periodscan.analysis.variant_plan import PlanSettings, variant_plan
from periodscan.designs.base import BUDGETS, EPOCH_LIST, LENGTH_LIST, Design, budget_ends, runs_for
from periodscan.designs.variants import FIELDS as VARIANT_FIELDS
from periodscan.designs.variants import variants_summary
from periodscan.engine.tree import RunSpec
from periodscan.params import COUNT, Interval, Options, bad_value


class WindowDesign(Design):
    """Starts x lengths under a ``fixed_total`` or ``fixed_recovery`` budget."""

    kind: ClassVar[str] = "window"
    fields: ClassVar[dict] = {
        "starts": [EPOCH_LIST],
        "lengths": [LENGTH_LIST],
        "budget": [Options(BUDGETS)],
        "recovery_epochs": [COUNT, None],
        **VARIANT_FIELDS,
    }

    def windows(self) -> list[tuple[int, int]]:
        starts = sorted(self.block["starts"])
        lengths = sorted(self.block["lengths"])
        longest = Interval(int, 1, self.epochs)
        if self.block.get("budget") == "fixed_total" and not longest.holds(lengths[-1]):
            raise bad_value("design.lengths", f"lengths that fit in schedule.epochs "
                            f"({self.epochs}): each {longest}", self.block["lengths"])
        return [(s, n) for s in starts for n in lengths]

    def preview(self) -> list[RunSpec]:
        windows = self.windows()
        ends = budget_ends(self.block, windows, self.epochs, "design.starts")
        return runs_for(self.seeds, windows, ends, self.variant_keys())

    def plan(self, runs: pd.DataFrame, table: pd.DataFrame, *, length: int | None = None,
             production_epochs: int | None = None, sweep: str = "") -> Any:
        """Where may a deficit of ``length`` epochs go; with deficit variants, the answer of
        every variant and across them (:class:`periodscan.analysis.variant_plan.VariantPlan`)."""
        if not self.variants:
            return super().plan(runs, table, length=length,
                                production_epochs=production_epochs, sweep=sweep)
        settings = PlanSettings(schedule_epochs=self.epochs, production_epochs=production_epochs,
                                budget=self.block.get("budget", "fixed_total"),
                                recovery_epochs=self.block.get("recovery_epochs"))
        return variant_plan(runs, table, length, settings, sweep=sweep,
                            axis=self.layout.variant_axis,
                            labels={v.key: v.label for v in self.variants})

    def summary(self) -> str:
        return (f"window: starts {sorted(self.block['starts'])} x lengths "
                f"{sorted(self.block['lengths'])}, {self.block.get('budget')}"
                + variants_summary(self.variants))


DESIGN = WindowDesign
