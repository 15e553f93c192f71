"""The search of the adaptive design: where to measure next, given the verdicts so far.

Pure functions of a table (start, verdict, interim mean damage), the seeds each start has and the
design's settings; :mod:`periodscan.designs.adaptive` runs the rounds. The rules are described
there.
"""

from __future__ import annotations

from typing import Any

import pandas as pd

from periodscan.analysis.verdicts import CRITICAL, SAFE


def grid(first: int, last: int, resolution: int) -> list[int]:
    """Every candidate start: the family Holm's correction counts."""
    return list(range(first, last + 1, resolution))


def coarse(first: int, last: int, step: int) -> list[int]:
    """The first round's starts: every ``step`` epochs, the last candidate included."""
    starts = list(range(first, last + 1, step))
    return starts if starts[-1] == last else [*starts, last]


def middle(a: int, b: int, resolution: int) -> int | None:
    """The grid point halfway between two measured starts, if there is one strictly between."""
    point = a + ((b - a) // 2 // resolution) * resolution
    return point if a < point < b else None


class _Starts:
    """What the search knows about each measured start: capped?, verdict, interim mean damage."""

    def __init__(self, table: pd.DataFrame, seeds: dict[int, int], settings: dict[str, Any]):
        self.cap, self.tolerance = settings["seeds_max"], settings["tolerance"]
        self.seeds = seeds
        self.row = {int(s): r for s, r in zip(table.start, table.itertuples(), strict=True)}
        self.ordered = sorted(s for s in seeds if s in self.row)

    def capped(self, start: int) -> bool:
        return self.seeds[start] >= self.cap

    def maybe_critical(self, start: int) -> bool:
        """Critical at the cap, or not yet capped and not screened out by its interim mean."""
        row = self.row[start]
        if self.capped(start):
            return row.verdict == CRITICAL
        return bool(row.damage > self.tolerance)

    def maybe_safe(self, start: int) -> bool:
        row = self.row[start]
        if self.capped(start):
            return row.verdict == SAFE
        return bool(row.damage < self.tolerance)


def _critical_edge(known: _Starts, settings: dict[str, Any]) -> dict[int, int]:
    """Starts to measure next for the latest critical start; empty once it is settled."""
    candidates = [s for s in known.ordered if known.maybe_critical(s)]
    if not candidates:
        return {}  # no start can be critical: the edge is "none"
    latest = candidates[-1]
    if not known.capped(latest):
        return {latest: known.cap}
    later = [s for s in known.ordered if s > latest]
    if not later:
        return {}
    return _close_gap(known, latest, later[0], settings)


def _safe_edge(known: _Starts, settings: dict[str, Any]) -> dict[int, int]:
    """Starts to measure next for the earliest start of the trailing safe stretch."""
    last = known.ordered[-1]
    if not known.capped(last):
        return {last: known.cap}
    if known.row[last].verdict != SAFE:
        return {}  # the last start is not safe: there is no safe stretch
    blockers = [s for s in known.ordered if not known.maybe_safe(s)]
    blocker = blockers[-1] if blockers else None
    after = [s for s in known.ordered if blocker is None or s > blocker]
    wanted = {s: known.cap for s in after if not known.capped(s)}
    if wanted or blocker is None:
        return wanted
    return _close_gap(known, blocker, after[0], settings)


def _close_gap(known: _Starts, low: int, high: int, settings: dict[str, Any]) -> dict[int, int]:
    """Between two measured starts on either side of an edge: bisect, or cap both at the end."""
    point = middle(low, high, settings["resolution"])
    if point is not None:
        return {point: settings["seeds_initial"]}
    return {s: known.cap for s in (low, high) if not known.capped(s)}


def next_round(table: pd.DataFrame, seeds: dict[int, int],
               settings: dict[str, Any]) -> dict[int, int]:
    """Seeds wanted per start for the next round (both edges at once); empty when settled."""
    known = _Starts(table, seeds, settings)
    wanted: dict[int, int] = {}
    for part in (_critical_edge(known, settings), _safe_edge(known, settings)):
        for start, n in part.items():
            wanted[start] = max(n, wanted.get(start, 0))
    return {s: n for s, n in wanted.items() if n > seeds.get(s, 0)}


def boundaries(table: pd.DataFrame) -> tuple[int | None, int | None]:
    """(latest critical start, earliest start from which all measured starts are safe)."""
    ordered = table.sort_values("start")
    critical = ordered[ordered.verdict == CRITICAL].start
    critical_until = int(critical.max()) if len(critical) else None
    safe_from = None
    for start, verdict in zip(ordered.start[::-1], ordered.verdict[::-1], strict=True):
        if verdict != SAFE:
            break
        safe_from = int(start)
    return critical_until, safe_from
