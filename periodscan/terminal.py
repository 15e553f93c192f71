"""Plain-text rendering of sweep results for the terminal: tables, plans, status, run trees."""

from __future__ import annotations

import math
import time

import pandas as pd

from periodscan.analysis.verdicts import CRITICAL, SAFE, describe_more_seeds
from periodscan.engine.tree import RunTree

MARKS = {CRITICAL: "CRITICAL", SAFE: "safe", "undetermined": "?"}


def _window(row, removal: bool) -> str:
    if removal:
        return f"until {row.start + row.length}"
    return f"[{row.start}, {row.start + row.length})"


def _open_note(seeds: int, more_seeds: float, confirmed: bool) -> str:
    """Why a start has no verdict: screened by the adaptive design, one seed, or too few."""
    if not confirmed:
        return (f"not confirmed: {seeds} seeds, screened by its mean (verdicts only at the "
                "seed cap)")
    if seeds < 2:
        return "one seed cannot decide"
    if isinstance(more_seeds, float) and math.isnan(more_seeds):
        return ""
    return f"needs {describe_more_seeds(more_seeds)}"


def row_notes(row) -> list[str]:
    """Short remarks a reader must see beside a window's numbers."""
    notes = []
    verdict = getattr(row, "verdict", None)
    if verdict == "undetermined":
        more = getattr(row, "more_seeds", math.nan)
        notes += [n for n in [_open_note(row.seeds, more, bool(getattr(row, "confirmed", True)))]
                  if n]
    elif verdict is None and pd.notna(row.damage_low) and row.damage_low > 0:
        notes.append("! damage")
    if row.short_recovery:
        notes.append(f"only {row.recovery_epochs} epochs to recover")
    if row.diverged:
        notes.append(f"{row.diverged} diverged (counted)")
    if getattr(row, "baseline_diverged", 0):
        notes.append(f"{row.baseline_diverged} baseline(s) diverged")
    if row.failed:
        notes.append(f"{row.failed} failed (not in mean)")
    if getattr(row, "unfinished", 0):
        notes.append(f"{row.unfinished} unfinished")
    if getattr(row, "no_baseline", 0):
        notes.append(f"{row.no_baseline} without baseline (not in mean)")
    return notes


def format_table(table: pd.DataFrame, removal: bool = False) -> str:
    """Sensitivity table as aligned text, with verdicts when the table has them."""
    if table.empty:
        return "(no finished windows yet)"
    level = int(round(100 * table.confidence.iloc[0]))
    verdicts = "verdict" in table
    head = (f"{'window':>12} {'seeds':>5} {'baseline %':>10} {'run %':>7} "
            f"{'damage':>7} {f'{level}% interval':>17}"
            + (f" {'verdict':>9}" if verdicts else "") + "  note")
    lines = [head, "-" * len(head)]
    for row in table.itertuples():
        low, high = row.damage_low, row.damage_high
        bounds = f"[{low:+6.2f}, {high:+6.2f}]" if pd.notna(low) else (
            "   (one seed)" if row.seeds == 1 else "     (none)")
        damage = f"{row.damage:>+7.2f}" if pd.notna(row.damage) else f"{'-':>7}"
        base = f"{row.baseline_acc:>10.2f}" if pd.notna(row.baseline_acc) else f"{'-':>10}"
        run = f"{row.run_acc:>7.2f}" if pd.notna(row.run_acc) else f"{'-':>7}"
        mark = f" {MARKS.get(row.verdict, row.verdict):>9}" if verdicts else ""
        lines.append(f"{_window(row, removal):>12} {row.seeds:>5} {base} {run} {damage} "
                     f"{bounds:>17}{mark}  {'; '.join(row_notes(row))}")
    if verdicts:
        tol = table.tolerance.iloc[0]
        lines.append(f"verdicts against a tolerance of {tol:g} points, Holm-corrected over the "
                     f"windows of each {'design' if removal else 'length'}; "
                     f"interval method: {', '.join(sorted(set(table.interval)))}")
    return "\n".join(lines)


def _epoch(value: float) -> str:
    return f"{value:.0f}" if float(value).is_integer() else f"{value:.1f}"


def format_plan(answer) -> str:
    """The planner's answer (periodscan.planner.PlanAnswer) as a readable block of text."""
    a = answer
    prod = a.production_epochs is not None
    lines = [f"Plan for a {a.length_asked}-epoch deficit in sweep '{a.sweep}' "
             f"({a.schedule_epochs}-epoch schedule), tolerance {points(a.tolerance)}, "
             f"{a.confidence:.0%} confidence"]
    if not a.length_measured:
        lines.append(f"  ! a {a.length_asked}-epoch deficit was not measured: answering from the "
                     f"nearest longer measured length, {a.length_used} epochs (conservative)")
    lines.append("")
    head = (f"{'start':>5} {'% of run':>8}" + (f" {'prod. epoch':>11}" if prod else "")
            + f" {'seeds':>5} {'damage':>7} {'Holm bounds':>17} {'verdict':>12}  note")
    lines += [head, "-" * len(head)]
    for s in a.starts:
        bounds = (f"[{s.holm_low:+6.2f}, {s.holm_high:+6.2f}]" if not math.isnan(s.holm_low)
                  else "(no interval)")
        damage = f"{s.damage:+7.2f}" if not math.isnan(s.damage) else f"{'-':>7}"
        notes = []
        if s.verdict not in (SAFE, CRITICAL):
            notes += [n for n in [_open_note(s.seeds, s.more_seeds, s.confirmed)] if n]
        if s.short_recovery:
            notes.append(f"only {s.recovery_epochs} clean epochs after")
        note = "; ".join(notes)
        lines.append(f"{s.start:>5} {s.start_frac:>8.0%}"
                     + (f" {_epoch(s.production_start):>11}" if prod else "")
                     + f" {s.seeds:>5} {damage} {bounds:>17} {MARKS.get(s.verdict, s.verdict):>12}"
                     + f"  {note}")
    lines.append("")
    lines += _plan_summary(a)
    lines.append("")
    lines += [f"note: {n}" for n in a.notes]
    return "\n".join(lines)


def _where(a, start: int) -> str:
    text = f"epoch {start} ({start / a.schedule_epochs:.0%} of training"
    if a.production_epochs is not None:
        text += f"; production epoch {_epoch(a.production(start))}"
    return text + ")"


def _plan_summary(a) -> list[str]:
    out = []
    if a.critical_starts:
        out.append(f"critical starts: {', '.join(map(str, a.critical_starts))} - a deficit "
                   f"starting there does damage above {points(a.tolerance)}")
        for group in a.critical_stretches():
            out.append(f"  critical window: {describe_stretch(a, group)}")
    else:
        out.append("critical starts: none established")
    out.append("safe starts: " + (", ".join(map(str, a.safe_starts)) if a.safe_starts
                                  else "none established"))
    if a.undetermined_starts:
        out.append("undetermined: " + ", ".join(map(str, a.undetermined_starts)))
    if a.safe_from is not None:
        out.append(f"safe from: {_where(a, a.safe_from)} on, every measured later start is safe")
    else:
        block = a.blocking_start()
        why = f" (start {block.start} is {block.verdict})" if block else ""
        out.append(f"safe from: no start from which every later measured start is safe{why}")
    if a.best is not None:
        b = a.best
        label = ("best safe slot" if a.best_is_safe
                 else "least damaging start (not established safe)")
        out.append(f"{label}: start {_where(a, b.start)}, expected damage {b.damage:+.2f} points "
                   f"({a.confidence:.0%} interval {b.damage_low:+.2f} to {b.damage_high:+.2f}, "
                   f"{b.seeds} seeds)")
    return out


def points(value: float) -> str:
    """'1 point', '0.5 points'."""
    return f"{value:g} point" + ("" if value == 1 else "s")


def describe_stretch(a, group: list[int]) -> str:
    """'starts 0 to 10 (deficit epochs 0 to 25, 0% to 42% of training)' for critical starts."""
    first, last = group[0], group[-1]
    end = last + a.length_used
    starts = f"start {first}" if first == last else f"starts {first} to {last}"
    text = (f"{starts} (deficit epochs {first} to {end}, {first / a.schedule_epochs:.0%} to "
            f"{end / a.schedule_epochs:.0%} of training")
    if a.production_epochs is not None:
        text += f"; production epochs {_epoch(a.production(first))} to {_epoch(a.production(end))}"
    text += ")"
    if all(s.short_recovery for s in a.starts if s.start in group):
        text += ", with little clean training after it"
    return text


def format_status(status) -> str:
    """A sweep's progress (periodscan.status.SweepStatus) in a few lines."""
    from periodscan.status import age, human_seconds

    s = status
    lines = [f"sweep '{s.name}' at {s.folder}: {s.state}"
             + (f" ({s.owner})" if s.owner else "")]
    by = s.runs_by_status
    detail = ", ".join(f"{by[k]} {k}" for k in ("done", "diverged", "failed", "pending")
                       if by.get(k))
    lines.append(f"runs:   {s.runs_done} / {s.runs_total} finished ({detail})")
    pct = 100 * s.epochs_done / s.epochs_total if s.epochs_total else 100.0
    lines.append(f"epochs: {s.epochs_done} / {s.epochs_total} trained ({pct:.0f}%)")
    if s.epochs_waiting_on_failures:
        lines.append(f"        {s.epochs_waiting_on_failures} epochs wait below failed segments; "
                     "rerun the sweep command to retry them")
    if s.seconds_per_epoch is not None:
        lines.append(f"speed:  {s.seconds_per_epoch:.2f} s per epoch measured, {s.workers} "
                     f"worker(s)")
    if s.eta_seconds:
        verb = "left" if s.state == "running" else "left if resumed"
        lines.append(f"ETA:    about {human_seconds(s.eta_seconds)} {verb}")
    lines.append(f"last result: {age(s.last_update)}"
                 + (f" ({time.strftime('%Y-%m-%d %H:%M', time.localtime(s.last_update))})"
                    if s.last_update else ""))
    for run_id, error in s.failures[:10]:
        lines.append(f"failed: {run_id}: {error}")
    if len(s.failures) > 10:
        lines.append(f"... and {len(s.failures) - 10} more failed runs")
    return "\n".join(lines)


def format_tree(tree: RunTree, seeds: list[int]) -> str:
    """The segment tree of the first seed, indented; other seeds have the same shape."""
    first = seeds[0]
    lines = [f"run tree of seed {first}" + (f" (seeds {seeds[1:]} are the same shape)"
                                             if len(seeds) > 1 else "")]

    def walk(sid: str, depth: int) -> None:
        seg = tree.segments[sid]
        kind = "DEFICIT" if seg.deficit_on else "clean  "
        ends = ", ".join(_run_label(r) for r in seg.finishes)
        store = "  [checkpoint]" if seg.children else ""
        tail = f"  -> {ends}" if ends else ""
        lines.append(f"{'  ' * depth}{kind} epochs {seg.begin:>3}-{seg.end:<3}{store}{tail}")
        for child in sorted(seg.children, key=lambda c: (tree.segments[c].begin,
                                                          not tree.segments[c].deficit_on)):
            walk(child, depth + 1)

    for root in tree.roots():
        if root.seed == first:
            walk(root.segment_id, 1)
    return "\n".join(lines)


def _run_label(run) -> str:
    if run.is_baseline:
        return f"baseline@{run.end}"
    return f"[{run.start},{run.start + run.length})@{run.end}"
