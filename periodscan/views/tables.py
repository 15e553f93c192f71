"""The sensitivity table as aligned text, and the remarks each window's row carries."""

from __future__ import annotations

import math

import pandas as pd

from periodscan.analysis.verdicts import CRITICAL, SAFE, UNDETERMINED
from periodscan.designs.layout import WINDOW, Layout
from periodscan.views.recovery import established_lines, row_trend_note
from periodscan.views.words import DIVERGED_WORDS, interval_summary, more_seeds_phrase

MARKS = {CRITICAL: "CRITICAL", SAFE: "safe", UNDETERMINED: "?"}


def open_note(seeds: int, more_seeds: float, confirmed: bool) -> str:
    """Why a start has no verdict: screened on its first seeds, one seed, or too few seeds."""
    if not confirmed:
        return (f"not confirmed: {seeds} seeds, screened by its mean (verdicts only at the "
                "seed cap)")
    if seeds < 2:
        return "one seed cannot decide"
    if isinstance(more_seeds, float) and math.isnan(more_seeds):
        return ""
    return f"needs {more_seeds_phrase(more_seeds)}"


def row_notes(row) -> list[str]:
    """Short remarks a reader must see beside a window's numbers (a table row's namedtuple)."""
    notes = []
    verdict = getattr(row, "verdict", None)
    if verdict == UNDETERMINED:
        more = getattr(row, "more_seeds", math.nan)
        note = open_note(row.seeds, more, bool(getattr(row, "confirmed", True)))
        notes += [note] if note else []
    elif verdict is None and pd.notna(row.damage_low) and row.damage_low > 0:
        notes.append("! damage")
    if row.short_recovery:
        notes.append(f"only {row.recovery_epochs} epochs to recover")
    trend = row_trend_note(row)  # present when the table was joined with its trends
    notes += [trend] if trend else []
    counts = [("diverged", f"{DIVERGED_WORDS} (counted)"),
              ("baseline_diverged", f"baseline(s) {DIVERGED_WORDS}"),
              ("failed", "failed (not in mean)"), ("unfinished", "unfinished"),
              ("no_baseline", "without baseline (not in mean)")]
    notes += [f"{getattr(row, column)} {words}" for column, words in counts
              if getattr(row, column, 0)]
    return notes


def _cells(row, layout: Layout) -> str:
    low, high = row.damage_low, row.damage_high
    bounds = f"[{low:+6.2f}, {high:+6.2f}]" if pd.notna(low) else (
        "   (one seed)" if row.seeds == 1 else "     (none)")
    damage = f"{row.damage:>+7.2f}" if pd.notna(row.damage) else f"{'-':>7}"
    base = f"{row.baseline_acc:>10.2f}" if pd.notna(row.baseline_acc) else f"{'-':>10}"
    run = f"{row.run_acc:>7.2f}" if pd.notna(row.run_acc) else f"{'-':>7}"
    window = layout.window_label(row.start, row.length)
    return f"{window:>12} {row.seeds:>5} {base} {run} {damage} {bounds:>17}"


def format_table(table: pd.DataFrame, layout: Layout = WINDOW, *,
                 family_size: int | None = None) -> str:
    """Sensitivity table as aligned text, with verdicts when the table has them.

    ``layout`` (the design's :class:`~periodscan.designs.layout.Layout`) labels the windows
    and names the Holm family; ``family_size`` is the Holm family when a design counted more
    candidates than it measured (for the footer's established bound).
    """
    if table.empty:
        return "(no finished windows yet)"
    if "variant" in table:  # a sweep of deficit variants: one block per variant
        from periodscan.views.variants import format_variant_table

        return format_variant_table(table, layout)
    level = int(round(100 * table.confidence.iloc[0]))
    verdicts = "verdict" in table
    head = (f"{'window':>12} {'seeds':>5} {'baseline %':>10} {'run %':>7} "
            f"{'damage':>7} {f'{level}% interval':>17}"
            + (f" {'verdict':>9}" if verdicts else "") + "  note")
    lines = [head, "-" * len(head)]
    for row in table.itertuples():
        mark = f" {MARKS.get(row.verdict, row.verdict):>9}" if verdicts else ""
        lines.append(f"{_cells(row, layout)}{mark}  {'; '.join(row_notes(row))}")
    footer = interval_summary(table)
    if verdicts:
        footer = (f"verdicts against a tolerance of {table.tolerance.iloc[0]:g} points, "
                  f"{layout.correction} {layout.family_words}; {footer}")
    lines.append(footer)
    lines += established_lines(table, layout.per_length, family_size)
    return "\n".join(lines)
