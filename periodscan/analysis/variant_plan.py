"""The planner's answer for a sweep of deficit variants: one plan per variant, and across them.

Each variant (severity level or deficit) gets the ordinary answer of
:func:`periodscan.analysis.planner.plan_from_table` from its own rows of the table. Across
variants, a severity sweep says per start which levels are safe or critical
(:func:`periodscan.analysis.variants.severity_answers`), and a sweep of several deficits ranks
the lapses at each start (:func:`periodscan.analysis.variants.rank_lapses`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from periodscan.analysis.planner import PlanAnswer, choose_length, plan_from_table
from periodscan.analysis.variants import (
    SeverityAnswer,
    StartRanking,
    rank_lapses,
    severity_answers,
)
from periodscan.errors import SweepError

#: Columns a variant table has beyond the ordinary table's.
VARIANT_COLUMNS = ("variant", "deficit", "severity")


@dataclass
class VariantPlan:
    """Answers for a deficit of ``length_used`` epochs, per variant and across variants.

    ``axis`` names what varies ("deficit", or "Blur sigma" for severity levels); ``labels``
    maps each variant key to its label, in the sweep's order (mildest level first).
    ``severity`` is filled for a severity sweep, ``ranking`` for every sweep of two or more
    variants (most useful for several deficits).
    """

    sweep: str
    axis: str
    is_severity: bool
    length_asked: int
    length_used: int
    tolerance: float
    confidence: float
    labels: dict[str, str]
    answers: dict[str, PlanAnswer]
    severity: list[SeverityAnswer] = field(default_factory=list)
    ranking: list[StartRanking] = field(default_factory=list)


@dataclass(frozen=True, kw_only=True)
class PlanSettings:
    """What a per-variant plan needs beyond its table (as ``plan_from_table`` takes it)."""

    schedule_epochs: int
    production_epochs: int | None = None
    budget: str = "fixed_total"
    recovery_epochs: int | None = None
    holm_family: int | None = None


def variant_rows(table: pd.DataFrame, key: str) -> pd.DataFrame:
    """One variant's rows as an ordinary sensitivity table (variant columns dropped)."""
    rows = table[table.variant == key]
    return rows.drop(columns=[c for c in VARIANT_COLUMNS if c in rows]).reset_index(drop=True)


def variant_plan(runs: pd.DataFrame, table: pd.DataFrame, length: int | None,
                 settings: PlanSettings, *, sweep: str, axis: str,
                 labels: dict[str, str]) -> VariantPlan:
    """Plan every variant of a variant table made with a tolerance (``length`` None: the
    shortest measured length)."""
    if table.empty:
        raise SweepError(f"sweep {sweep!r} has no finished window runs yet; nothing to plan from")
    measured = sorted(int(n) for n in table.length.unique())
    asked = measured[0] if length is None else length
    answers = {}
    for key in labels:
        rows = variant_rows(table, key)
        if rows.empty:
            continue
        answers[key] = plan_from_table(
            rows, asked, settings.schedule_epochs, settings.production_epochs,
            sweep=f"{sweep}, {labels[key]}", budget=settings.budget,
            recovery_epochs=settings.recovery_epochs, holm_family=settings.holm_family)
    used = choose_length(asked, measured)
    is_severity = "severity" in table
    confidence = float(table.confidence.iloc[0])
    return VariantPlan(
        sweep=sweep, axis=axis, is_severity=is_severity, length_asked=asked, length_used=used,
        tolerance=float(table.tolerance.iloc[0]), confidence=confidence,
        labels={k: v for k, v in labels.items() if k in answers}, answers=answers,
        severity=severity_answers(table, used) if is_severity else [],
        ranking=rank_lapses(runs, table, used, confidence) if len(answers) > 1 else [])


@dataclass
class VariantAnswers:
    """One answer per variant, for a design whose question is asked of each variant alone
    (a removal design: how long may each deficit last?). ``answers`` maps a variant key to
    its design's ordinary answer; ``labels`` the key to its label, in the sweep's order."""

    sweep: str
    axis: str
    is_severity: bool
    labels: dict[str, str]
    answers: dict[str, Any]


def each_variant(table: pd.DataFrame, answer: Callable[[pd.DataFrame, str], Any], *, sweep: str,
                 axis: str, labels: dict[str, str]) -> VariantAnswers:
    """``answer(rows, sweep_label)`` for every variant with rows in a variant table."""
    if table.empty:
        raise SweepError(f"sweep {sweep!r} has no finished window runs yet; nothing to plan from")
    answers = {key: answer(variant_rows(table, key), f"{sweep}, {label}")
               for key, label in labels.items() if (table.variant == key).any()}
    return VariantAnswers(sweep=sweep, axis=axis, is_severity="severity" in table,
                          labels={k: v for k, v in labels.items() if k in answers},
                          answers=answers)
