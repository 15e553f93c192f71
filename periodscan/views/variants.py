"""A sweep of deficit variants in words: its table per variant, and the plan across variants.

The variant table (:func:`periodscan.analysis.variants.variant_table`) is shown as one block of
the ordinary table per variant; the plan (:class:`periodscan.analysis.variant_plan.
VariantPlan`) as a severity-by-start table or a ranking of lapses by start, then the ordinary
answer of each variant in short.
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict
from typing import Any

import pandas as pd

from periodscan.analysis import planner
from periodscan.analysis.variant_plan import VariantAnswers, VariantPlan, variant_rows
from periodscan.analysis.variants import StartRanking, label_column
from periodscan.designs.layout import WINDOW, Layout
from periodscan.views.plan import plan_notes, plan_record, plan_summary
from periodscan.views.tables import MARKS, format_table
from periodscan.views.words import PROXY_CAVEAT, json_ready, points


def variant_label(table: pd.DataFrame, key: str, layout: Layout = WINDOW) -> str:
    """'blur' for a deficit, 'Blur sigma 2' for a severity level."""
    row = table[table.variant == key].iloc[0]
    if label_column(table) == "deficit":
        return str(row.deficit)
    value = row.severity
    shown = f"{value:g}" if isinstance(value, (int, float)) else str(value)
    return f"{layout.variant_axis} {shown}".strip()


def variant_noun(table: pd.DataFrame) -> str:
    """What one variant is called: 'deficit', or 'level' in a severity sweep."""
    return "deficit" if label_column(table) == "deficit" else "level"


def format_variant_table(table: pd.DataFrame, layout: Layout = WINDOW) -> str:
    """One block of :func:`periodscan.views.tables.format_table` per variant, in sweep order."""
    blocks = []
    for key in pd.unique(table.variant):
        head = f"{variant_noun(table)}: {variant_label(table, key, layout)}"
        blocks.append(f"{head}\n{format_table(variant_rows(table, key), layout)}")
    return "\n\n".join(blocks)


def _cell(verdict: str, damage: float) -> str:
    value = f"{damage:+.2f}" if math.isfinite(damage) else "-"
    return f"{MARKS.get(verdict, verdict)} {value}"


def _level(value: Any) -> str:
    if value is None:
        return "none"
    return f"{value:g}" if isinstance(value, (int, float)) else str(value)


def severity_lines(plan: VariantPlan) -> list[str]:
    """Per start: each level's verdict and damage, the most severe safe and least severe
    critical level."""
    labels = list(plan.labels.values())
    texts = [{k: _cell(*cell) for k, cell in s.cells().items()} for s in plan.severity]
    width = max([12, *(len(label) for label in labels),
                 *(len(text) for cells in texts for text in cells.values())])
    head = (f"{'start':>5}  " + " ".join(f"{label:>{width}}" for label in labels)
            + f"  {'safe up to':>10}  {'critical from':>13}")
    lines = [f"Severity by start ({plan.length_used}-epoch deficits; 'safe up to': the most "
             "severe level that is safe with every milder level safe too; 'critical from': the "
             "least severe critical level" + ("; '-': not measured there" if any(
                 set(plan.labels) - set(s.keys) for s in plan.severity) else "") + "):",
             head, "-" * len(head)]
    for s, measured in zip(plan.severity, texts, strict=True):
        cells = " ".join(f"{measured.get(k, '-'):>{width}}" for k in plan.labels)
        lines.append(f"{s.start:>5}  {cells}  {_level(s.safe_up_to):>10}  "
                     f"{_level(s.critical_from):>13}")
    return lines


def _ranking_line(plan: VariantPlan, r: StartRanking) -> str:
    first = plan.labels.get(r.order[0], r.order[0])
    line = f"{r.start:>5}  {first:<16} {r.damages[0]:>+7.2f}"
    if len(r.order) < 2:
        return line
    second = plan.labels.get(r.order[1], r.order[1])
    bounds = (f"[{r.gap_low:+.2f}, {r.gap_high:+.2f}]" if math.isfinite(r.gap_low)
              else "(no interval)")
    verdict = ("clearly costs more" if r.clear else
               "not told apart" if r.seeds >= 2 else "one seed cannot tell")
    return (f"{line}  {second:<16} {r.damages[1]:>+7.2f}  {r.gap:>+7.2f} {bounds:>18}  "
            f"{verdict}")


def ranking_lines(plan: VariantPlan) -> list[str]:
    """Per start: the lapse that costs most, the runner-up and the paired difference."""
    head = (f"{'start':>5}  {'costs most':<16} {'damage':>7}  {'runner-up':<16} {'damage':>7}  "
            f"{'gap':>7} {'Holm bounds':>18}")
    lines = [f"Which lapse costs most, by start ({plan.length_used}-epoch deficits; gap = paired "
             "difference in damage over the seeds both have, two-sided paired t test, Holm over "
             "the starts):", head, "-" * len(head)]
    return lines + [_ranking_line(plan, r) for r in plan.ranking]


def format_variant_plan(plan: VariantPlan) -> str:
    """The whole answer as text: across variants first, then each variant's answer."""
    levels = ", ".join(plan.labels.values())
    lines = [f"Plan for a {plan.length_asked}-epoch deficit in sweep '{plan.sweep}', by "
             f"{plan.axis} ({levels}{'; mildest first' if plan.is_severity else ''}), "
             f"tolerance {points(plan.tolerance)}, {plan.confidence:.0%} confidence"]
    if plan.length_used != plan.length_asked:
        lines.append(f"  ! a {plan.length_asked}-epoch deficit was not measured: answering from "
                     f"the nearest longer measured length, {plan.length_used} epochs")
    if plan.severity:
        lines += ["", *severity_lines(plan)]
    if plan.ranking and not plan.is_severity:
        lines += ["", *ranking_lines(plan)]
    noun = "level" if plan.is_severity else "deficit"
    for key, answer in plan.answers.items():
        lines += ["", f"{noun}: {plan.labels[key]}"]
        lines += [f"  {line}" for line in plan_summary(answer)]
        lines += [f"  note: {n}" for n in plan_notes(answer, skip=(planner.METHOD,
                                                                   planner.PROXY))]
    first = next(iter(plan.answers.values()), None)
    if first is not None:
        others = tuple(f.code for f in first.facts if f.code != planner.METHOD)
        lines += ["", *(f"note: {n}" for n in plan_notes(first, skip=others))]
        staged = any(f.code == planner.SEQUENTIAL for f in first.facts)
        sharing = (f"alpha is shared over the starts of one length and one {noun} as its notes "
                   "above say" if staged else
                   f"Holm's correction runs over the starts of one length and one {noun}")
        lines.append(f"note: Each {noun} is judged on its own: {sharing}. {PROXY_CAVEAT}")
    return "\n".join(lines)



def variant_plan_record(plan: VariantPlan) -> dict[str, Any]:
    """The answer as plain data: per-variant plan records (as ``plan --json`` gives for one
    deficit), the severity answers and the ranking."""
    return json_ready({
        "sweep": plan.sweep, "axis": plan.axis, "is_severity": plan.is_severity,
        "length_asked": plan.length_asked, "length_used": plan.length_used,
        "tolerance": plan.tolerance, "confidence": plan.confidence, "labels": plan.labels,
        "severity": [asdict(s) for s in plan.severity],
        "ranking": [asdict(r) for r in plan.ranking],
        "answers": {key: plan_record(a) for key, a in plan.answers.items()},
    })


def variant_plan_json(plan: VariantPlan, indent: int | None = 2) -> str:
    """:func:`variant_plan_record` as a JSON string (``periodscan plan --json``)."""
    return json.dumps(variant_plan_record(plan), indent=indent)


def format_variant_answers(answers: VariantAnswers) -> str:
    """Each variant's answer in its design's own words, under a heading naming the variant."""
    from periodscan.views.answers import answer_text  # it registers this function

    noun = "level" if answers.is_severity else "deficit"
    return "\n\n".join(f"== {noun}: {answers.labels[key]} ==\n{answer_text(answer)}"
                       for key, answer in answers.answers.items())


def variant_answers_json(answers: VariantAnswers, indent: int | None = 2) -> str:
    """{sweep, axis, labels, answers: {key: the answer's own JSON record}} as a JSON string."""
    from periodscan.views.answers import answer_json  # it registers this function

    record = {"sweep": answers.sweep, "axis": answers.axis, "is_severity": answers.is_severity,
              "labels": answers.labels,
              "answers": {key: json.loads(answer_json(a)) for key, a in answers.answers.items()}}
    return json.dumps(record, indent=indent)


__all__ = ["format_variant_answers", "format_variant_plan", "format_variant_table",
           "ranking_lines", "severity_lines", "variant_answers_json", "variant_label",
           "variant_plan_json", "variant_plan_record"]
