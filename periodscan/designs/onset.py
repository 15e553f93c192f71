"""``design=onset``: a lasting change made at epoch t and kept to the end, for several t.

A change that stays (an augmentation switched on, a new data source, a different label set) is
the deficit on from epoch t to the end of training: the window ``[t, end)``. Every onset is
compared with never making the change (the baseline, the table's damage) and with making it at
epoch 0 (the delay cost, paired by seed; see :mod:`periodscan.analysis.onset`), so onset 0 is
always run. Each onset branches from its seed's baseline trunk at epoch t, exactly like a
window. ``plan`` answers "the latest epoch at which switching costs at most the tolerance,
compared with switching at 0" (:mod:`periodscan.analysis.onset_plan`).
"""

from __future__ import annotations

from typing import ClassVar

import pandas as pd

from periodscan.analysis.onset import add_delay_columns
from periodscan.analysis.onset_plan import EpochAnswer, onset_plan
from periodscan.analysis.sensitivity import TableOptions, resolution, sensitivity_table
from periodscan.designs.base import EPOCH_LIST, Design, runs_for
from periodscan.designs.layout import Layout
from periodscan.engine.tree import RunSpec
from periodscan.params import bad_value

ONSET = Layout(axis="start", axis_title="change made from epoch (onset)", per_length=False,
               family_words="every onset of the design", plannable=False,
               label_format="from epoch {start}", line_format="change kept to the end")


class OnsetDesign(Design):
    """The deficit on during ``[t, schedule.epochs)`` for every t in ``onsets`` and for t = 0."""

    kind: ClassVar[str] = "onset"
    layout: ClassVar[Layout] = ONSET
    family: ClassVar[str] = "all"
    fields: ClassVar[dict] = {"onsets": [EPOCH_LIST]}

    def onsets(self) -> list[int]:
        """The onsets asked for, with 0 (the reference) added, in order."""
        given = sorted(self.block["onsets"])
        if given[-1] >= self.epochs:
            raise bad_value("design.onsets", f"epochs before the last one: each an int in the "
                            f"range [0, {self.epochs - 1}] (schedule.epochs is {self.epochs}; "
                            "a change at or after it never happens)", self.block["onsets"])
        return sorted({0, *given})

    def preview(self) -> list[RunSpec]:
        windows = [(t, self.epochs - t) for t in self.onsets()]
        return runs_for(self.seeds, windows, {w: self.epochs for w in windows})

    def table(self, runs: pd.DataFrame, confidence: float, tolerance: float | None,
              mcnemar: pd.DataFrame | None = None, *,
              num_classes: int | None = None) -> pd.DataFrame:
        """Damage against never (verdicts Holm over every onset) and the delay cost against
        onset 0 with its interval. No onset leaves clean epochs after it, by design, so none
        is flagged for a short recovery."""
        options = TableOptions(confidence=confidence, tolerance=tolerance, family=self.family,
                               num_classes=num_classes, min_recovery=0)
        used = self.runs_used(runs)
        table = sensitivity_table(used, self.epochs, options, mcnemar)
        if table.empty:
            return table
        return add_delay_columns(table, used, confidence, sd_floor=resolution(used))

    def plan(self, runs: pd.DataFrame, table: pd.DataFrame, *, length: int | None = None,
             production_epochs: int | None = None, sweep: str = "") -> EpochAnswer:
        """The latest onset whose cost against switching at 0 is established within the
        tolerance (the onsets' runs last to the end, so a deficit length has no meaning)."""
        if length is not None:
            raise bad_value("length", "None for an onset sweep (every change lasts to the end "
                            "of training)", length)
        return onset_plan(table, self.runs_used(runs), schedule_epochs=self.epochs,
                          sweep=sweep, production_epochs=production_epochs)

    def summary(self) -> str:
        return f"onset: change from epoch t to the end, t in {self.onsets()} (0 = reference)"


DESIGN = OnsetDesign
