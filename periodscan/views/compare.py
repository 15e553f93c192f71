"""Several sweeps compared (:class:`periodscan.analysis.compare.Comparison`) as text and JSON."""

from __future__ import annotations

import json
import math
import textwrap
from dataclasses import asdict
from typing import Any

import pandas as pd

from periodscan.analysis.compare import (
    BASELINES_DIFFER,
    NO_SHARED_SEEDS,
    PAIRED,
    SAME_RUNS,
    Comparison,
    Pairing,
)
from periodscan.views.tables import MARKS
from periodscan.views.words import PROXY_CAVEAT, json_ready, points

#: Long lines (edge summaries, notes) are wrapped to this many characters.
WIDTH = 100
LADDER_CAVEAT = ("Agreement along a ladder of proxies is evidence, not proof, that the "
                 "production model behaves alike. " + PROXY_CAVEAT)


def rung_lines(c: Comparison) -> list[str]:
    """One line per sweep: name, baseline, seeds, epochs and what differs from the first."""
    width = max(len(r.label) for r in c.rungs)
    lines = []
    for i, r in enumerate(c.rungs):
        changes = "; ".join(f"{k} {v[0]!r} -> {v[1]!r}" for k, v in r.changes.items())
        what = "(first)" if i == 0 else (changes or "same training settings as the first")
        lines.append(f"  {r.label:<{width}}  baseline {r.baseline_acc:6.2f}% ({r.seeds} seeds, "
                     f"{r.schedule_epochs} epochs)  {what}")
    return lines


def pairing_words(p: Pairing) -> str:
    """'ladder32 vs ladder16: Welch's t (different training: model.channels)'."""
    head = f"{p.b} vs {p.a}: "
    if p.method == PAIRED and p.reason == SAME_RUNS:
        return head + (f"paired by seed over {len(p.seeds)} seeds (the baselines are the same "
                       "runs: same training, run ids, accuracies and per-example results)")
    if p.reason == NO_SHARED_SEEDS:
        return head + "Welch's t (no seed has a finished baseline in both)"
    if p.reason == BASELINES_DIFFER:
        return head + ("Welch's t (same training settings, but the baseline runs' results "
                       "differ: another thread count or version?)")
    what = ", ".join(p.keys) if p.keys else "the data loaded (fingerprint)"
    return head + f"Welch's t (the baselines are different runs; training differs in {what})"


def _interval(mean: float, low: float, high: float) -> str:
    if not math.isfinite(mean):
        return "(no finished runs)"
    if not (math.isfinite(low) and math.isfinite(high)):
        return f"{mean:+6.2f} (no interval)"
    return f"{mean:+6.2f} [{low:+6.2f}, {high:+6.2f}]"


def window_block(c: Comparison, length: int) -> list[str]:
    """The rows of one deficit length: per window, each sweep's damage and its difference."""
    curves = c.curves[c.curves.length == length]
    diffs = c.differences.set_index(["sweep", "start", "length"])
    width = max(6, *(len(r.label) for r in c.rungs))
    head = (f"{'window':>12}  {'sweep':<{width}} {'seeds':>5}  {'damage and interval':<24} "
            f"{'verdict':>8}  difference vs {c.against} sweep")
    lines = [head, "-" * len(head)]
    for start in sorted(curves.start.unique()):
        rows = curves[curves.start == start]
        label = c.layout.window_label(start, length)
        for k, row in enumerate(rows.itertuples()):
            key = (row.sweep, row.start, length)
            diff = ""
            if key in diffs.index:
                d = diffs.loc[key]
                diff = (_interval(d.difference, d.low, d.high)
                        + (" *" if d.differs else "") + f"  ({d.method})")
            lines.append(f"{label if k == 0 else '':>12}  {row.sweep:<{width}} {row.seeds:>5}  "
                         f"{_interval(row.damage, row.damage_low, row.damage_high):<24} "
                         f"{MARKS.get(row.verdict, row.verdict):>8}  {diff}".rstrip())
    return lines


def edge_value(value: Any) -> str:
    """An edge's start as text ('none' when there is none)."""
    return "none" if value is None or (isinstance(value, float) and math.isnan(value)) \
        else str(int(value))


def edge_rows(c: Comparison, length: int) -> list[str]:
    """One line per sweep: where its critical edge lies on the shared starts."""
    width = max(len(r.label) for r in c.rungs)
    return [f"  {row.sweep:<{width}}  latest critical start {edge_value(row.critical_until):>4}"
            f", every later start safe from {edge_value(row.safe_from):>4}"
            + ("" if row.located else "; undetermined at the edge")
            for row in c.edges[c.edges.length == length].itertuples()]


def edge_summary(c: Comparison, length: int) -> str:
    """Does the edge move, and does a difference of damage back the move?"""
    moves = c.edge_moves.set_index("length").loc[length]
    edges = c.edges[c.edges.length == length]
    until = " -> ".join(edge_value(v) for v in edges.critical_until)
    safe = " -> ".join(edge_value(v) for v in edges.safe_from)
    if not moves.moves:
        first = edges.iloc[0]
        if first.critical_until is None and first.safe_from is None:
            return "no sweep places an edge (no critical start, no safe stretch to the end)"
        where = (f"latest critical start {edge_value(first.critical_until)}, safe from "
                 f"{edge_value(first.safe_from)}")
        if edges.located.all():
            return (f"the edge stays in place on every sweep ({where}), to the spacing of the "
                    "starts measured")
        return f"every sweep reads the edge alike ({where}), but undetermined starts blur it"
    if moves.backed:
        rows = c.changes[(c.changes.length == length) & c.changes.differs]
        where = "; ".join(f"start {r.start}: {r.sweep} minus {r.against} {r.difference:+.2f} "
                          f"[{r.low:+.2f}, {r.high:+.2f}]" for r in rows.head(3).itertuples())
        return (f"the edge MOVES along the sweeps by their verdicts (latest critical start "
                f"{until}; safe from {safe}), and the damage differs at a start where a verdict "
                f"changes ({where}): the sweeps disagree near the edge")
    return (f"the verdicts place the edge differently (latest critical start {until}; safe "
            f"from {safe}), but wherever a verdict changes near the edge the difference of "
            "damage is within its interval of zero: these seeds do not show that it moves")


def edge_block(c: Comparison, length: int) -> list[str]:
    """Where each sweep puts the critical edge for one length, and whether it moves."""
    starts = ", ".join(map(str, c.edge_moves.set_index("length").loc[length].starts))
    return [f"edge of the critical window ({c.layout.line_label(length)}, on the starts every "
            f"sweep measured: {starts}):", *edge_rows(c, length),
            textwrap.fill(edge_summary(c, length), WIDTH, initial_indent="  ",
                          subsequent_indent="    ")]


def notes(c: Comparison) -> list[str]:
    """Footer lines: what the differences are, mismatched schedules or tolerances, caution."""
    out = [f"differences: damage of a sweep minus damage of the {c.against} sweep, in points; "
           f"{c.confidence:.0%} intervals per window, not corrected for the number of windows; "
           "* the interval excludes 0"]
    out += ["pairing: " + pairing_words(p) for p in c.pairings]
    epochs = sorted({r.schedule_epochs for r in c.rungs})
    if len(epochs) > 1:
        out.append(f"schedules differ ({', '.join(map(str, epochs))} epochs): windows are "
                   "matched by epoch number, not by fraction of training")
    own = sorted({r.tolerance for r in c.rungs})
    if own != [c.tolerance]:
        out.append(f"the sweeps were run with tolerances of {', '.join(f'{t:g}' for t in own)} "
                   f"points; every verdict here uses {points(c.tolerance)}")
    out.append("caution: " + LADDER_CAVEAT)
    return out


def format_comparison(c: Comparison, figure: str | None = None) -> str:
    """The comparison as text: sweeps, per-window damage and differences, edges, notes."""
    lines = [f"comparing {len(c.rungs)} sweeps; verdicts at a tolerance of "
             f"{points(c.tolerance)} and {c.confidence:.0%} confidence (Holm, as each sweep's "
             "table)", *rung_lines(c), ""]
    for length in c.lengths:
        lines += window_block(c, length) + [""] + edge_block(c, length) + [""]
    lines += [textwrap.fill(note, WIDTH, subsequent_indent="    ") for note in notes(c)]
    if figure:
        lines.append(f"figure: {figure}")
    return "\n".join(lines)



def _records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    return [json_ready(row) for row in frame.astype(object).to_dict(orient="records")]


def comparison_record(c: Comparison, figure: str | None = None) -> dict[str, Any]:
    """Plain dict of the comparison (NaN as None), what ``--json`` prints."""
    return {
        "tolerance": c.tolerance, "confidence": c.confidence, "against": c.against,
        "lengths": c.lengths, "sweeps": [json_ready(asdict(r)) for r in c.rungs],
        "pairings": [json_ready(asdict(p)) for p in c.pairings],
        "curves": _records(c.curves), "differences": _records(c.differences),
        "edges": _records(c.edges), "edge_moves": _records(c.edge_moves),
        "verdict_changes": _records(c.changes),
        "caution": LADDER_CAVEAT, "figure": figure,
    }


def comparison_json(c: Comparison, figure: str | None = None, indent: int | None = 2) -> str:
    return json.dumps(comparison_record(c, figure), indent=indent)
