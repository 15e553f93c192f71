"""The report's result sections in HTML: the answer, the table, run health, method."""

from __future__ import annotations

import pandas as pd

from periodscan.analysis import planner
from periodscan.analysis.planner import PlanAnswer
from periodscan.analysis.stats import BOOTSTRAP_MIN_SEEDS
from periodscan.designs.layout import Layout
from periodscan.views.markup import bullet_list, definition_list, escape, number
from periodscan.views.plan import best_line, describe_stretch, plan_notes, safe_from_line
from periodscan.views.recovery import (
    METHOD_ESTABLISHED,
    METHOD_TREND,
    established_lines,
    established_text,
)
from periodscan.views.tables import row_notes
from periodscan.views.words import (
    DIVERGED_WORDS,
    PROXY_CAVEAT,
    interval_summary,
    more_seeds_phrase,
)


def _starts(values: list[int], css: str) -> str:
    if not values:
        return '<span class="undetermined">none established</span>'
    return f'<span class="{css}">{escape(", ".join(map(str, values)))}</span>'


def plan_html(plan: PlanAnswer) -> str:
    """One planner answer: critical and safe starts, safe-from epoch, best slot, its notes."""
    rows = [("critical starts", _starts(plan.critical_starts, "critical"))]
    rows += [("critical window", escape(describe_stretch(plan, g)))
             for g in plan.critical_stretches()]
    rows.append(("safe starts", _starts(plan.safe_starts, "safe")))
    if plan.undetermined_starts:
        rows.append(("undetermined", _starts(plan.undetermined_starts, "undetermined")))
    rows.append(("safe from", escape(safe_from_line(plan))))
    if plan.best is not None:
        label, text = best_line(plan)
        rows.append((label, escape(text)))
    if plan.undetermined_starts and plan.established is not None:
        rows.append(("established", escape(established_text(plan.established, "start"))))
    head = f"{plan.length_used}-epoch deficit"
    if not plan.length_measured:
        head = f"{plan.length_asked}-epoch deficit (answered from {plan.length_used} epochs)"
    notes = plan_notes(plan, skip=(planner.METHOD, planner.PROXY))  # the page says both once
    note_html = "".join(f"<li>{escape(n)}</li>" for n in notes)
    return (f"<h3>{escape(head)}</h3>{definition_list(rows)}"
            + (f"<ul class='fig-note'>{note_html}</ul>" if note_html else ""))


def answer_html(table: pd.DataFrame, plans: list[PlanAnswer], layout: Layout,
                finished: bool) -> str:
    """The answer: the planner's per length, or the verdicts by window when there is no plan."""
    if not (len(table) and finished):
        return "<h2>Answer</h2><p>No window run has finished yet.</p>"
    tol, conf = table.tolerance.iloc[0], table.confidence.iloc[0]
    out = f"<h2>Answer at a tolerance of {tol:g} points, {conf:.0%} confidence</h2>"
    if plans:
        return out + "".join(plan_html(p) for p in plans)
    labels = [layout.window_label(s, n) for s, n in zip(table.start, table.length, strict=True)]
    verdicts = list(table.verdict)
    rows = [(v, escape(", ".join(label for label, w in zip(labels, verdicts, strict=True)
                                 if w == v) or "none established"))
            for v in ("critical", "safe")]
    return out + definition_list(rows)


def _row_cells(row, layout: Layout, epochs: int) -> list:
    interval = (f"{number(row.damage_low)} to {number(row.damage_high)}"
                if pd.notna(row.damage_low) else "&ndash;")
    holm = (f"{number(row.holm_low)} to {number(row.holm_high)}"
            if pd.notna(row.holm_low) else "&ndash;")
    mcn = (f"{row.mcnemar_differ} of {row.mcnemar_tested}"
           if getattr(row, "mcnemar_tested", 0) else "&ndash;")
    x = layout.x_value(row.start, row.length)
    return [escape(layout.window_label(row.start, row.length)), f"{x} ({x / epochs:.0%})",
            row.seeds, number(row.baseline_acc, "{:.2f}"), number(row.run_acc, "{:.2f}"),
            number(row.damage), interval, holm,
            f"<span class='{row.verdict}'>{row.verdict}</span>", mcn,
            escape("; ".join(row_notes(row)))]


def table_html(table: pd.DataFrame, layout: Layout, epochs: int) -> str:
    """The sensitivity table with verdicts, one row per window, and its interval methods."""
    level = int(round(100 * table.confidence.iloc[0]))
    heads = ["window", layout.axis, "seeds", "baseline %", "run %", "damage",
             f"{level}% interval", layout.bounds_title, "verdict", "McNemar differs", "notes"]
    out = ["<div class='scroll'><table><tr>" + "".join(
        f"<th class='l'>{h}</th>" if h in ("window", "notes") else f"<th>{h}</th>"
        for h in heads) + "</tr>"]
    for row in table.itertuples():
        cells = _row_cells(row, layout, epochs)
        classes = {0: "l", len(cells) - 1: "l n"}
        tds = "".join(f"<td class='{classes[i]}'>{c}</td>" if i in classes else f"<td>{c}</td>"
                      for i, c in enumerate(cells))
        out.append(f"<tr class='v-{row.verdict}'>{tds}</tr>")
    out.append("</table></div>")
    out.append(f"<p class='fig-note'>{escape(interval_summary(table))}; "
               f"{escape(layout.correction)} {escape(layout.family_words)}.</p>")
    out += [f"<p class='fig-note'>{escape(line)}</p>"
            for line in established_lines(table, layout.per_length)]
    return "".join(out)


def runs_html(status, table: pd.DataFrame) -> str:
    """How healthy the runs were: finished, diverged or at chance, failed, unfinished."""
    by = status.runs_by_status
    parts = [f"{by.get(k, 0)} {k}" for k in ("done", "diverged", "failed", "pending")
             if by.get(k)]
    items = [f"{status.runs_done} of {status.runs_total} runs finished ({', '.join(parts)}); "
             f"{status.epochs_done} of {status.epochs_total} epochs trained."]
    if len(table) and table.diverged.sum():
        items.append(f"{int(table.diverged.sum())} window run(s) {DIVERGED_WORDS}; they count "
                     "in the means with the accuracy they ended at.")
    if len(table) and table.baseline_diverged.sum():
        items.append(f"{int(table.baseline_diverged.sum())} baseline pairing(s) rest on a "
                     f"baseline that {DIVERGED_WORDS}: the damage of those windows is measured "
                     "against it.")
    if len(table) and (table.failed.sum() or table.unfinished.sum()):
        items.append(f"{int(table.failed.sum() + table.unfinished.sum())} window run(s) failed "
                     "or are unfinished: left out of the means, counted in the table notes.")
    items += [f"failed: {run_id}: {error}" for run_id, error in status.failures[:12]]
    return bullet_list(items)


def method_html(table: pd.DataFrame, layout: Layout) -> str:
    """How the numbers were made, and the caveats."""
    used = interval_summary(table).removeprefix("intervals: ") if len(table) else "none"
    return bullet_list([
        f"Intervals: Student-t for fewer than {BOOTSTRAP_MIN_SEEDS} seeds, BCa bootstrap "
        f"(scipy.stats.bootstrap) from {BOOTSTRAP_MIN_SEEDS} on; used here: {used}. The seeds "
        "column says how many seeds each number rests on.",
        "Verdicts: for each window, a two-sided one-sample t test of the per-seed damages "
        f"against the tolerance; {layout.correction} {layout.family_words}. A window whose "
        "Holm-adjusted p-value clears the level is decided in the direction of its mean: "
        "critical = damage significantly above the tolerance (Holm lower bound above it); safe "
        "= significantly below (Holm upper bound below it); everything else is undetermined. A "
        "window with one seed is never decided, and a wide interval never makes a window safe.",
        "More seeds: for undetermined windows, the seeds at which the t bound at the "
        "Bonferroni level would likely clear the tolerance, if mean and spread stay as "
        f"measured ({more_seeds_phrase(float('inf'))} is reported as such).",
        "McNemar: each window run against its baseline of the same seed, example by example on "
        "the shared test set (exact binomial below 25 discordant examples, chi-square with "
        "continuity correction above); the column counts seeds whose two models differ at the "
        "unadjusted level.",
        "Runs that diverged (non-finite loss) or ended at chance level (a one-sided binomial "
        "test cannot tell their held-out accuracy from 1 / number of classes at the table's "
        "level) count with the accuracy they ended at and are counted in the notes; failed and "
        "unfinished runs are left out of means and counted in the notes.",
        "Starts are also given as a fraction of the schedule; mapping them onto a longer "
        "production schedule assumes sensitivity scales with the fraction of training.",
        METHOD_TREND, METHOD_ESTABLISHED, PROXY_CAVEAT,
    ])
