"""The report's sections for a sweep of deficit variants: the answer across and per variant,
and the sensitivity table per variant."""

from __future__ import annotations

import pandas as pd

from periodscan.analysis.variant_plan import VariantPlan, variant_rows
from periodscan.designs.layout import Layout
from periodscan.views.html_results import plan_html, table_html
from periodscan.views.markup import definition_list, escape, number
from periodscan.views.variants import variant_label, variant_noun


def _html_table(heads: list[str], rows: list[list[str]]) -> str:
    """Cells are taken as HTML; the first column is left-aligned."""
    head = "".join(f"<th class='l'>{escape(h)}</th>" if i == 0 else f"<th>{escape(h)}</th>"
                   for i, h in enumerate(heads))
    body = "".join("<tr>" + "".join(f"<td class='l'>{c}</td>" if i == 0 else f"<td>{c}</td>"
                                    for i, c in enumerate(row)) + "</tr>" for row in rows)
    return f"<div class='scroll'><table><tr>{head}</tr>{body}</table></div>"


def _verdict_cell(verdict: str, damage: float) -> str:
    return f"<span class='{escape(verdict)}'>{escape(verdict)}</span> {number(damage)}"


def _level(value) -> str:
    return "none" if value is None else escape(f"{value:g}" if isinstance(value, (int, float))
                                               else value)


def severity_html(plan: VariantPlan) -> str:
    """Per start: every level's verdict and damage, the most severe safe and least severe
    critical level."""
    heads = ["start", *plan.labels.values(), "safe up to", "critical from"]
    rows = [[str(s.start), *(_verdict_cell(*s.cells()[k]) if k in s.keys else "not measured"
                             for k in plan.labels),
             _level(s.safe_up_to), _level(s.critical_from)] for s in plan.severity]
    return (f"<h3>Severity by start ({plan.length_used}-epoch deficits)</h3>"
            + _html_table(heads, rows)
            + "<p class='fig-note'>'safe up to': the most severe level that is safe with every "
            "milder level safe too; 'critical from': the least severe critical level.</p>")


def ranking_html(plan: VariantPlan) -> str:
    """Per start: the lapse that costs most, the runner-up and their paired difference."""
    rows = []
    for r in plan.ranking:
        names = [escape(plan.labels.get(k, k)) for k in r.order]
        gap = (f"{number(r.gap)} ({number(r.gap_low)} to {number(r.gap_high)})"
               if len(names) > 1 else "&ndash;")
        told = "clearly costs more" if r.clear else "not told apart"
        rows.append([str(r.start), f"<b>{names[0]}</b> {number(r.damages[0])}",
                     f"{names[1]} {number(r.damages[1])}" if len(names) > 1 else "&ndash;",
                     gap, told])
    return (f"<h3>Which lapse costs most ({plan.length_used}-epoch deficits)</h3>"
            + _html_table(["start", "costs most", "runner-up", "gap (Holm bounds)", ""], rows)
            + "<p class='fig-note'>Gap: the paired difference in damage between the two, over "
            "the seeds both have (two-sided paired t test, Holm over the starts).</p>")


def variant_answer_html(plans: list[VariantPlan]) -> str:
    """Across variants (severity or ranking), then each variant's ordinary answer."""
    parts = []
    for plan in plans:
        if plan.severity:
            parts.append(severity_html(plan))
        if plan.ranking and not plan.is_severity:
            parts.append(ranking_html(plan))
        noun = "level" if plan.is_severity else "deficit"
        parts += [f"<h3>{escape(noun)}: {escape(plan.labels[key])}</h3>{plan_html(answer)}"
                  for key, answer in plan.answers.items()]
    return "".join(parts)


def variant_tables_html(table: pd.DataFrame, layout: Layout, epochs: int) -> str:
    """The sensitivity table of each variant under its own heading."""
    noun = variant_noun(table)
    return "".join(f"<h3>{escape(noun)}: {escape(variant_label(table, key, layout))}</h3>"
                   + table_html(variant_rows(table, key), layout, epochs)
                   for key in pd.unique(table.variant))


def verdicts_html(table: pd.DataFrame, layout: Layout) -> str:
    """Without a plan: each variant's critical and safe windows."""
    parts = []
    for key in pd.unique(table.variant):
        rows = variant_rows(table, key)
        found = [(v, ", ".join(layout.window_label(r.start, r.length)
                                for r in rows.itertuples() if r.verdict == v)
                  or "none established") for v in ("critical", "safe")]
        parts.append(f"<h3>{escape(variant_noun(table))}: "
                     f"{escape(variant_label(table, key, layout))}</h3>"
                     + definition_list([(v, f"<span class='{v}'>{escape(text)}</span>")
                                        for v, text in found]))
    return "".join(parts)


def variant_answer_section(table: pd.DataFrame, plans: list, layout: Layout,
                           finished: bool) -> str:
    """The report's answer for a variant sweep: its :class:`VariantPlan` answers, or each
    variant's verdicts when the design has no such plan."""
    if not (len(table) and finished):
        return "<h2>Answer</h2><p>No window run has finished yet.</p>"
    tol, conf = table.tolerance.iloc[0], table.confidence.iloc[0]
    head = f"<h2>Answer at a tolerance of {tol:g} points, {conf:.0%} confidence</h2>"
    mine = [p for p in plans if isinstance(p, VariantPlan)]
    if not mine and "verdict" in table:
        return head + verdicts_html(table, layout)
    return head + variant_answer_html(mine)
