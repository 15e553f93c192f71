"""``design=removal``: the deficit from epoch 0 until epoch t, for several t, then clean.

It answers "how long may a deficit at the start of training last?". Every run is a window that
starts at 0, so the runs share one deficit trunk per seed; Holm's correction runs over all of
them (one question), and the curve is drawn against the epoch the deficit is removed. With
``design.severity`` or ``design.deficits`` each variant has its own deficit trunk and its own
Holm family, and the plan answers for each variant.
"""

from __future__ import annotations

from typing import Any, ClassVar

import pandas as pd

from periodscan.analysis.onset_plan import EpochAnswer, removal_plan
from periodscan.analysis.variant_plan import each_variant
from periodscan.designs.base import BUDGETS, LENGTH_LIST, Design, budget_ends, runs_for
from periodscan.designs.layout import REMOVAL, Layout
from periodscan.designs.variants import FIELDS as VARIANT_FIELDS
from periodscan.designs.variants import variants_summary
from periodscan.engine.tree import RunSpec
from periodscan.params import COUNT, Options, bad_value


class RemovalDesign(Design):
    """Deficit on during ``[0, t)`` for every t in ``until``."""

    kind: ClassVar[str] = "removal"
    layout: ClassVar[Layout] = REMOVAL
    family: ClassVar[str] = "all"
    fields: ClassVar[dict] = {
        "until": [LENGTH_LIST],
        "budget": [Options(BUDGETS)],
        "recovery_epochs": [COUNT, None],
        **VARIANT_FIELDS,
    }

    def preview(self) -> list[RunSpec]:
        windows = [(0, t) for t in sorted(self.block["until"])]
        ends = budget_ends(self.block, windows, self.epochs, "design.until")
        return runs_for(self.seeds, windows, ends, self.variant_keys())

    def plan(self, runs: pd.DataFrame, table: pd.DataFrame, *, length: int | None = None,
             production_epochs: int | None = None, sweep: str = "") -> Any:
        """The latest epoch the deficit may last to with damage within the tolerance (when
        may a curriculum end?); the removal epochs are the design's, so no length is asked.
        With deficit variants, that answer for each variant (a ``VariantAnswers``)."""
        if length is not None:
            raise bad_value("length", "None for a removal sweep (its deficit lengths are the "
                            "design's until epochs)", length)

        def answer(rows: pd.DataFrame, label: str) -> EpochAnswer:
            return removal_plan(rows, schedule_epochs=self.epochs, sweep=label,
                                production_epochs=production_epochs,
                                budget=self.block.get("budget", "fixed_total"),
                                recovery_epochs=self.block.get("recovery_epochs"))

        if not self.variants:
            return answer(table, sweep)
        return each_variant(table, answer, sweep=sweep, axis=self.layout.variant_axis,
                            labels={v.key: v.label for v in self.variants})

    def summary(self) -> str:
        return (f"removal: deficit from epoch 0 until {sorted(self.block['until'])}, "
                f"{self.block.get('budget')}" + variants_summary(self.variants))


DESIGN = RemovalDesign
