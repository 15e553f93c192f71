"""Plain-text rendering of sweep results for the terminal."""

from __future__ import annotations

import pandas as pd

from periodscan.engine.tree import RunTree


def format_table(table: pd.DataFrame, removal: bool = False) -> str:
    """Sensitivity table as aligned text; '!' marks an interval that excludes zero damage."""
    if table.empty:
        return "(no finished windows yet)"
    level = int(round(100 * table.confidence.iloc[0]))
    head = (f"{'window':>12} {'seeds':>5} {'baseline %':>10} {'run %':>7} "
            f"{'damage':>7} {f'{level}% interval':>17}  note")
    lines = [head, "-" * len(head)]
    for row in table.itertuples():
        window = f"[{row.start}, {row.start + row.length})"
        low, high = row.damage_low, row.damage_high
        bounds = f"[{low:+6.2f}, {high:+6.2f}]" if pd.notna(low) else "   (one seed)"
        notes = []
        if pd.notna(low) and low > 0:
            notes.append("! damage")
        if row.short_recovery:
            notes.append(f"only {row.recovery_epochs} epochs to recover")
        if row.diverged:
            notes.append(f"{row.diverged} diverged")
        if row.failed:
            notes.append(f"{row.failed} failed")
        lines.append(f"{window:>12} {row.seeds:>5} {row.baseline_acc:>10.2f} {row.run_acc:>7.2f} "
                     f"{row.damage:>+7.2f} {bounds:>17}  {'; '.join(notes)}")
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
