"""The Design interface: which runs a sweep trains, and how its table is read back.

A design turns the ``design`` block of a config into runs (seed, window, end epoch) round by
round, says which runs of a ledger its table uses, and builds that table with the right Holm
family. Everything else (the job that trains, the views that show) calls this interface and
never asks which design it is; a new design is one module in this package plus one config file.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import replace
from typing import Any, ClassVar

import pandas as pd

from periodscan.analysis.planner import plan_from_table
from periodscan.analysis.sensitivity import TableOptions, sensitivity_table
from periodscan.analysis.variants import variant_table
from periodscan.designs.layout import WINDOW, Layout
from periodscan.designs.variants import (
    FIELDS,
    Variant,
    axis_title,
    design_variants,
    refuse_variants,
    stored_variants,
    variant_state,
    variants_summary,
)
from periodscan.engine.tree import RunSpec, baseline
from periodscan.errors import SweepError
from periodscan.params import COUNT, EPOCH, ListOf, Options, Shown, bad_value, check, check_value

#: Budgets: every run ends at the last epoch, or gets a fixed number of clean epochs after.
BUDGETS = ("fixed_total", "fixed_recovery")
EPOCH_LIST = ListOf(EPOCH, distinct=True,
                    words="a non-empty list of distinct epochs (ints >= 0), "
                          "or ${span:first,last,step}")
LENGTH_LIST = ListOf(COUNT, distinct=True,
                     words="a non-empty list of distinct lengths (ints >= 1), "
                           "or ${span:first,last,step}")

#: Ledger meta key under which a job stores ``Design.state()`` for readers.
STATE_KEY = "design_state"

#: Reads a finished sweep's runs frame (the ledger's ``runs_frame``) between rounds.
Measured = Callable[[], pd.DataFrame]


class Design:
    """One way of choosing windows. Subclasses set ``kind`` (= module name) and ``fields``."""

    kind: ClassVar[str] = ""
    layout: ClassVar[Layout] = WINDOW
    #: Constraint table of the ``design`` block (see :mod:`periodscan.params`).
    fields: ClassVar[dict[str, list[Any]]] = {}
    #: Holm family: "length" (the windows of one length) or "all" (every window).
    family: ClassVar[str] = "length"
    #: True when later rounds are chosen from the results of earlier ones.
    more_rounds: ClassVar[bool] = False

    def __init__(self, plain: dict[str, Any], seeds: list[int], state: Any = None):
        self.block = dict(plain.get("design") or {})
        self.epochs = int(plain["schedule"]["epochs"])
        self.seeds = list(seeds)
        self.confidence = float(plain.get("confidence", 0.95))
        self.tolerance = plain.get("tolerance")
        check(self.block, {"kind": [Options((self.kind,))], **self.fields}, "design.")
        self.variants: list[Variant] = []
        if set(FIELDS) <= set(self.fields):
            deficit = plain.get("deficit") or {}
            self.variants = design_variants(self.block, deficit, stored_variants(state))
            if self.variants:
                self.layout = replace(self.layout, variant_axis=axis_title(self.variants, deficit),
                                      family_words=f"{self.layout.family_words}, per variant")
        else:
            refuse_variants(self.block, self.kind)

    # --- what to train ----------------------------------------------------------------
    def rounds(self, measured: Measured) -> Iterator[list[RunSpec]]:
        """Runs to train, round by round; ``measured()`` reads what is finished so far."""
        yield self.preview()

    def preview(self) -> list[RunSpec]:
        """The runs of the first round (what ``sweep --dry-run`` describes)."""
        raise NotImplementedError

    # --- reading back -----------------------------------------------------------------
    def runs_used(self, runs: pd.DataFrame) -> pd.DataFrame:
        """The rows of a ledger's runs frame that this design's table rests on."""
        ids = {r.run_id for r in self.preview()}
        return runs[runs.run_id.isin(ids)]

    def table(self, runs: pd.DataFrame, confidence: float, tolerance: float | None,
              mcnemar: pd.DataFrame | None = None, *,
              num_classes: int | None = None) -> pd.DataFrame:
        """Sensitivity table of this design's runs, verdicts Holm-corrected over its family;
        with ``num_classes``, runs that ended at chance level are counted as diverged."""
        options = TableOptions(confidence=confidence, tolerance=tolerance, family=self.family,
                               num_classes=num_classes)
        if self.variants:
            return variant_table(self.runs_used(runs), self.epochs, options, mcnemar,
                                 self.variant_columns())
        return sensitivity_table(self.runs_used(runs), self.epochs, options, mcnemar)

    def variant_keys(self) -> list[str]:
        """Keys of the deficit variants each window is trained with ([""]: the config's)."""
        return [v.key for v in self.variants] or [""]

    def variant_blocks(self) -> dict[str, dict[str, Any]]:
        """Variant key -> the deficit block its runs train with ({} without variants)."""
        return {v.key: v.deficit for v in self.variants}

    def variant_columns(self) -> list[tuple[str, dict[str, Any]]]:
        """(key, columns the table gains for it): the deficit's label, or the severity level."""
        return [(v.key, {"deficit": v.label} if v.param is None else {"severity": v.value})
                for v in self.variants]

    def holm_family_size(self) -> int | None:
        """Hypotheses Holm counts when more than the measured windows (None: just those)."""
        return None

    def plan(self, runs: pd.DataFrame, table: pd.DataFrame, *, length: int | None = None,
             production_epochs: int | None = None, sweep: str = "") -> Any:
        """The design's answer to its planning question, from its table (made with a
        tolerance) and the runs it rests on. Window designs: where may a deficit of
        ``length`` epochs go (default: the shortest measured length)?"""
        if not self.layout.plannable:
            raise SweepError(f"plan answers window designs (where may a deficit of L epochs "
                             f"go?); this sweep's design is {self.summary()}: read its table "
                             "instead")
        if length is None:
            if table.empty:
                raise SweepError(f"sweep {sweep!r} has no window runs yet")
            length = int(table.length.min())
        return plan_from_table(table, length, self.epochs, production_epochs, sweep=sweep,
                               budget=self.block.get("budget", "fixed_total"),
                               recovery_epochs=self.block.get("recovery_epochs"),
                               holm_family=self.holm_family_size())

    def state(self) -> Any:
        """What a reader needs beyond the config to rebuild the table (JSON-able), or None:
        the deficit variants, for a design that has them."""
        return variant_state(self.variants)

    @classmethod
    def state_from_meta(cls, meta: dict[str, Any]) -> Any:
        """The stored state in a ledger's meta values (see :meth:`state`)."""
        return meta.get(STATE_KEY)

    def notes(self) -> list[str]:
        """Lines the design has to say after running (rounds taken, edges found)."""
        return []

    def summary(self) -> str:
        """One line describing the design for reports."""
        return f"{self.kind}: " + ", ".join(f"{k}={v}" for k, v in self.block.items()
                                             if k != "kind") + variants_summary(self.variants)


def budget_ends(block: dict[str, Any], windows: list[tuple[int, int]], epochs: int,
                field: str) -> dict[tuple[int, int], int]:
    """End epoch of every (start, length) window under the design's budget.

    ``field`` is the design key to blame for a window past the last epoch (the starts of a
    window design, the ``until`` epochs of a removal design).
    """
    budget = check_value("design.budget", block.get("budget"), [Options(BUDGETS)])
    if budget == "fixed_recovery":
        recovery = check_value("design.recovery_epochs", block.get("recovery_epochs"), [COUNT])
        return {(s, n): s + n + recovery for s, n in windows}
    for start, length in windows:
        if start + length > epochs:
            latest = epochs - length
            raise bad_value(field, f"windows that end by the last epoch ({epochs}); for length "
                            f"{length} the latest start is {latest}",
                            Shown(f"window [{start}, {start + length})"))
    return {w: epochs for w in windows}


def runs_for(seeds: list[int], windows: list[tuple[int, int]],
             ends: dict[tuple[int, int], int], variants: list[str] = ("",)) -> list[RunSpec]:
    """Every window run (once per deficit variant) and the baselines they are compared with,
    for each seed."""
    runs = []
    for seed in seeds:
        runs += [RunSpec(seed=seed, start=s, length=n, end=ends[(s, n)], variant=v)
                 for v in variants for s, n in windows]
        runs += [baseline(seed, end) for end in sorted(set(ends.values()))]
    return runs
