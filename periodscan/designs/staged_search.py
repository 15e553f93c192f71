"""The search of the sequential design: which (start, severity level) cells to measure next.

Pure functions of what is known about each measured cell: its label and whether it is settled.
A settled cell has its final verdict (critical, safe, or undetermined when stopped for futility
or at the seed cap); an unsettled one carries a provisional label from its interim mean damage
(above the tolerance: critical, otherwise safe) that only steers the search.

Two bisections, both assuming the damage is monotone between the cells they measured:

* **Levels, at each measured start.** Levels are ordered mildest first. With ``ends`` a start is
  first measured at its mildest and most severe level, and between two measured levels whose
  labels differ the level halfway is measured. With ``middle`` it is first measured at its
  middle level, then at the middle of the levels its labels leave unknown (a binary search: a
  level more severe than a critical one is critical, one milder than a safe one safe). Either
  way until the threshold (the least severe critical level, the most severe safe level) is found
  between neighbouring levels.
* **Starts.** Starts are first measured every ``initial_step`` epochs. For each level, the gaps
  that hold an edge of the answer are bisected (:func:`edge_gaps`): the gap before the first and
  after the latest critical start, and the gap before the trailing stretch of safe starts; the
  start halfway on the grid is measured, until the edge's neighbours are ``resolution`` apart.
  Gaps between two starts inside a stretch are not searched: their noise does not move an edge.

Starts between two measured starts with the same answer are not measured: their answer is
implied (:func:`implied_labels`). A change that begins and ends between two measured starts
with the same answer is missed; choose ``initial_step`` below the narrowest stretch that matters.

:func:`bisection_graph` lays the shares of alpha along the same bisection, so that the starts
the search measures first hold the level, and a decided start passes it to the starts the search
would measure next beside it.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from itertools import takewhile

from periodscan.analysis.alpha_graph import AlphaGraph
from periodscan.analysis.sequential import Stages
from periodscan.analysis.staged_verdicts import DECIDED, OPEN
from periodscan.analysis.verdicts import CRITICAL, SAFE, UNDETERMINED

#: Label of a level no measurement speaks for.
UNKNOWN = "unknown"

#: How a start's threshold level is searched (``design.level_search``): ``ends`` measures the
#: mildest and most severe level first, then halfway between levels whose labels differ (3
#: cells of 3 levels where the threshold lies inside); ``middle`` measures the middle level
#: first, then the middle of what its label leaves unknown (2 cells of 3 levels, or all 3 when
#: the middle one ends undetermined).
LEVEL_SEARCH = ("ends", "middle")


@dataclass(frozen=True)
class Known:
    """What the search knows about one measured cell."""

    label: str  # critical, safe or undetermined (settled); critical or safe (provisional)
    settled: bool
    #: The final verdict of a settled cell, undetermined when stopped for futility or at the
    #: cap (its label then steers by its mean); None while open.
    verdict: str | None = None


def known_cell(verdict: str, stopped: str, mean: float, tolerance: float) -> Known:
    """What the search knows of a measured cell: its verdict once decided, else its mean damage
    against the tolerance (a cell left undetermined at the cap or for futility steers by its
    estimate too, so the search does not chase its noise)."""
    label = verdict if stopped == DECIDED else (CRITICAL if mean > tolerance else SAFE)
    settled = stopped != OPEN
    return Known(label=label, settled=settled, verdict=verdict if settled else None)


def next_seeds(cells: Mapping[tuple[int, int], int], known: Mapping[tuple[int, int], Known],
               stages: Stages, levels: int, resolution: int,
               search: str = "ends") -> dict[tuple[int, int], int]:
    """Seeds per cell for the next round: open cells to their next stage, new cells at the
    first; {} when the search is settled."""
    todo = {cell: stages.next_stage(n) for cell, n in cells.items()
            if cell in known and not known[cell].settled}
    for cell in next_cells(known, levels, resolution, search):
        todo.setdefault(cell, stages.seeds[0])
    return {c: n for c, n in todo.items() if n is not None and n > cells.get(c, 0)}


def level_labels(cells: Mapping[int, Known], levels: int) -> list[str]:
    """Labels of every level at one start: measured ones as known, the rest implied.

    A level between two measured levels with the same label takes it; a level more severe than
    a critical one is critical, one milder than a safe one is safe; otherwise unknown.
    """
    out = []
    measured = sorted(cells)
    for level in range(levels):
        if level in cells:
            out.append(cells[level].label)
            continue
        below = [cells[v].label for v in measured if v < level]
        above = [cells[v].label for v in measured if v > level]
        if below and above and below[-1] == above[0]:
            out.append(below[-1])
        elif below and below[-1] == CRITICAL:
            out.append(CRITICAL)
        elif above and above[0] == SAFE:
            out.append(SAFE)
        else:
            out.append(UNKNOWN)
    return out


def middle(a: int, b: int, resolution: int) -> int | None:
    """The grid point halfway between two measured starts, if there is one strictly between."""
    point = a + ((b - a) // 2 // resolution) * resolution
    return point if a < point < b else None


def new_levels(cells: Mapping[int, Known], levels: int | None = None,
               search: str = "ends") -> list[int]:
    """Levels to add at one start. ``ends``: halfway between neighbouring measured levels that
    differ. ``middle``: the middle of each run of levels whose label is unknown, a level left
    undetermined counting as no label (the threshold is near it: both sides may be decided)."""
    if search == "middle":
        steer = {v: Known(UNDETERMINED, True) if c.verdict == UNDETERMINED else c
                 for v, c in cells.items()}
        unknown = [v for v, label in enumerate(level_labels(steer, levels or 0))
                   if label == UNKNOWN]
        runs: list[list[int]] = []
        for v in unknown:
            if runs and runs[-1][-1] == v - 1:
                runs[-1].append(v)
            else:
                runs.append([v])
        return [run[len(run) // 2] for run in runs]
    measured = sorted(cells)
    wanted = []
    for low, high in zip(measured, measured[1:], strict=False):
        if cells[low].label != cells[high].label and high - low > 1:
            wanted.append((low + high) // 2)
    return wanted


def first_levels(levels: int, search: str = "ends") -> list[int]:
    """Where a new start is measured first: its mildest and most severe level (``ends``), or
    its middle one (``middle``; of an even count, the more severe of the two)."""
    if search not in LEVEL_SEARCH:
        raise ValueError(f"level search {search!r} is not one of {LEVEL_SEARCH}")
    return [levels // 2] if search == "middle" else sorted({0, levels - 1})


def edge_gaps(labels: dict[int, str]) -> list[tuple[int, int]]:
    """Gaps between neighbouring measured starts (of one level) that hold an edge of the
    answer: before the first and after the latest critical start, and before the trailing
    stretch of safe starts. Gaps elsewhere only hold noise the answer does not need."""
    starts = sorted(labels)
    pairs = list(zip(starts, starts[1:], strict=False))
    critical = [s for s in starts if labels[s] == CRITICAL]
    gaps = []
    if critical:
        gaps += [(a, b) for a, b in pairs if b == critical[0] or a == critical[-1]]
    tail = list(takewhile(lambda s: labels[s] == SAFE, reversed(starts)))
    if tail and len(tail) < len(starts):
        gaps += [(a, b) for a, b in pairs if b == tail[-1]]
    return gaps


def next_cells(known: Mapping[tuple[int, int], Known], levels: int,
               resolution: int, search: str = "ends") -> list[tuple[int, int]]:
    """New (start, level) cells to measure, in start then level order; [] when none."""
    by_start: dict[int, dict[int, Known]] = {}
    for (start, level), cell in known.items():
        by_start.setdefault(start, {})[level] = cell
    wanted = [(s, v) for s, cells in sorted(by_start.items())
              for v in new_levels(cells, levels, search)]
    answers = {s: level_labels(cells, levels) for s, cells in by_start.items()}
    for level in range(levels):
        for low, high in edge_gaps({s: a[level] for s, a in answers.items()}):
            point = middle(low, high, resolution)
            if point is not None:
                wanted += [(point, v) for v in first_levels(levels, search)]
    return [cell for cell in dict.fromkeys(sorted(wanted)) if cell not in known]


def implied_labels(known: Mapping[tuple[int, int], Known], levels: int,
                   grid: list[int]) -> dict[tuple[int, int], str]:
    """Label of every grid cell: measured, implied between levels, or implied level by level
    between the nearest measured starts on either side when their labels at that level agree
    (unknown where they do not). Level by level, because a neighbour measured at other levels
    says nothing against an agreement at this one."""
    by_start: dict[int, dict[int, Known]] = {}
    for (start, level), cell in known.items():
        by_start.setdefault(start, {})[level] = cell
    starts = sorted(by_start)
    answers = {s: level_labels(by_start[s], levels) for s in starts}
    out = {}
    for start in grid:
        if start in answers:
            out.update({(start, v): label for v, label in enumerate(answers[start])})
            continue
        before = [s for s in starts if s < start]
        after = [s for s in starts if s > start]
        for level in range(levels):
            low = answers[before[-1]][level] if before else UNKNOWN
            high = answers[after[0]][level] if after else UNKNOWN
            out[(start, level)] = low if low == high else UNKNOWN
    return out


def bisection_graph(grid: list[int], coarse: list[int], resolution: int) -> AlphaGraph:
    """Shares of alpha that follow the search over starts, fixed before any data.

    The coarse starts (measured first, whatever the data) share alpha evenly; every other start
    begins at zero. A decided start passes its share in equal parts to the next starts the
    bisection would place beside it: a coarse start to the midpoints of the gaps to its coarse
    neighbours, the midpoint of (a, b) to the midpoints of (a, m) and (m, b). A start with no
    such midpoint (its neighbours are ``resolution`` apart) passes to the two starts whose gap
    it halved, or, coarse, to its coarse neighbours. A share passed to a start the search never
    measures stays there, unused; that costs power, never error control.
    """
    index = {s: i for i, s in enumerate(grid)}
    if any(s not in index for s in coarse):
        raise ValueError(f"coarse starts {coarse} must lie on the grid {grid}")
    targets: dict[int, list[int]] = {}

    def halves(a: int, b: int) -> None:
        point = middle(a, b, resolution)
        if point is None:
            return
        children = [c for c in (middle(a, point, resolution), middle(point, b, resolution))
                    if c is not None]
        targets[point] = children or [a, b]
        halves(a, point)
        halves(point, b)

    for a, b in zip(coarse, coarse[1:], strict=False):
        halves(a, b)
    for j, start in enumerate(coarse):
        neighbours = coarse[max(j - 1, 0):j] + coarse[j + 1:j + 2]
        gaps = [tuple(sorted((start, n))) for n in neighbours]
        children = [c for c in (middle(a, b, resolution) for a, b in gaps) if c is not None]
        targets[start] = children or neighbours
    m = len(grid)
    weights = [1.0 / len(coarse) if s in coarse else 0.0 for s in grid]
    passes = [[0.0] * m for _ in grid]
    for start, to in targets.items():
        for t in to:
            passes[index[start]][index[t]] = 1.0 / len(to)
    return AlphaGraph(tuple(weights), tuple(map(tuple, passes)))


__all__ = ["CRITICAL", "LEVEL_SEARCH", "SAFE", "UNDETERMINED", "UNKNOWN", "Known",
           "bisection_graph",
           "first_levels", "known_cell", "next_seeds",
           "edge_gaps", "implied_labels", "level_labels", "middle", "new_levels",
           "next_cells"]
