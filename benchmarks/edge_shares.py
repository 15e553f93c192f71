"""How much of alpha the sequential test needs at the grid's edges: why a design that looks at a
window's seeds several times gives the answer of a one-look grid only where the grid decided its
edges with room to spare.

The planner's answer rests on a few cells per level: the critical window's last start and the
first start of the trailing safe stretch (safe-from). The tree grid decides each with one t test
on all 16 seeds, Holm over the starts of its level: a cell rejected at Holm step i of m is
tested at alpha / (m - i + 1). The sequential design tests the same cell at 3, 5, 8, 12 and 16
seeds; with ``union`` spending, look k is tested at the alpha the spending function assigns it
out of the share the cell holds. So for each edge cell of the grid's answer this script finds
the smallest share with which some look would cross on the same seeds in the sequential order
(its p value at each look against that look's level), and sets it beside the share the grid's
Holm gave it. An edge whose needed share is above what the grid's Holm gave it can be decided
by a sequential design only if the design holds more alpha there than the grid does after
rejecting every start before it in Holm's order, and a design that measures a fraction of the
starts has rejected fewer.

It reads the runs of ``fewer_epochs.py --ways grid fresh`` and trains nothing. Split 0 is seeds
0..15 in order (the pair ``fewer_epochs.py`` compared); the other splits, as in
``split_halves.py``, are random halves of the 32 seeds, the sequential order being the half's
random order.

    python benchmarks/edge_shares.py [--only demo noise40 severity] [--splits 200]
                                     [--results-dir /work/bench] [--out FILE]
"""

from __future__ import annotations

import argparse
import math
import os
import time
from dataclasses import dataclass
from pathlib import Path

import fewer_epochs as fe
import numpy as np
import pandas as pd
from scipy import optimize
from split_halves import Pooled, pooled, split_arguments, split_orders

from periodscan.analysis.sensitivity import resolution
from periodscan.analysis.sequential import Stages
from periodscan.analysis.staged_verdicts import looks_of, seed_damages
from periodscan.analysis.verdicts import CRITICAL, SAFE

HERE = Path(__file__).resolve().parent
ALPHA = 0.05
KINDS = ("obrien_fleming", "pocock")


@dataclass(frozen=True)
class Edge:
    """One edge cell of a grid's answer."""

    label: str  # the level ("-" without severity levels)
    start: int
    edge: str  # "critical to", "safe from"
    p_cap: float  # the grid's p value on all of its seeds
    holm_share: float  # the share of alpha Holm tested it at when it rejected it
    pvalues: tuple[float, ...]  # p at each look in the sequential order


def edge_starts(verdicts: dict[int, str]) -> list[tuple[int, str]]:
    """The cells a level's answer rests on: its last critical start, and the first start of
    the trailing stretch of safe starts."""
    starts = sorted(verdicts)
    out = []
    critical = [s for s in starts if verdicts[s] == CRITICAL]
    if critical:
        out.append((critical[-1], "critical to"))
    tail = []
    for s in reversed(starts):
        if verdicts[s] != SAFE:
            break
        tail.append(s)
    if tail:
        out.append((tail[-1], "safe from"))
    return out


def holm_shares(pvalues: pd.Series) -> dict[int, float]:
    """Per start: alpha / (m - i + 1), the level Holm's step i of m tests it at (Holm 1979),
    the smallest p value at step 1."""
    ranked = pvalues.fillna(1.0).sort_values(kind="stable")
    m = len(ranked)
    return {int(s): ALPHA / (m - i) for i, s in enumerate(ranked.index)}


def grid_edges(data: Pooled, half: list[int], stages: Stages) -> list[Edge]:
    """The edge cells of the grid's answer on the seeds ``half`` (tested in that order)."""
    design = data.design(data.grid, sorted(half))
    used = design.runs_used(data.runs)
    table = design.table(used, 1.0 - ALPHA, 0.5, None, num_classes=data.classes)
    damages = seed_damages(used, list(half))
    floor = resolution(used)
    keys = table["variant"].astype(str) if "variant" in table else pd.Series("", table.index)
    out = []
    for key in dict.fromkeys(keys):
        rows = table[keys == key].set_index("start")
        shares = holm_shares(rows.p_value)
        label = key.replace("=", " ") or "-"
        for start, edge in edge_starts(rows.verdict.to_dict()):
            tests = looks_of(damages[(key, int(start))], stages, 0.5, floor)
            out.append(Edge(label, int(start), edge, float(rows.at[start, "p_value"]),
                            shares[int(start)], tuple(float(t.pvalue) for t in tests)))
    return out


def needed_share(pvalues: tuple[float, ...], stages: Stages) -> tuple[float, int]:
    """The smallest share of alpha with which some look crosses (its level at least the
    look's p value), and that look; (inf, -1) when no share up to alpha would do."""
    best, look = math.inf, -1
    for k, p in enumerate(pvalues):
        if not np.isfinite(p):
            continue
        if p <= 0.0:
            return 0.0, k
        if stages.levels(ALPHA)[k] < p:
            continue
        share = optimize.brentq(lambda a, k=k, p=p: stages.levels(a)[k] - p, 1e-15, ALPHA,
                                xtol=1e-12)
        if share < best:
            best, look = share, k
    return best, look


def cell_lines(edges: list[Edge], stages: dict[str, Stages]) -> list[str]:
    lines = ["  level     start  edge          grid p   Holm gave   needs (O'Brien-Fleming)  "
             "needs (Pocock)    p at each look"]
    for e in edges:
        cols = []
        for kind in KINDS:
            share, look = needed_share(e.pvalues, stages[kind])
            cols.append(f"{share / ALPHA:5.3f} at {stages[kind].seeds[look]:2d} seeds"
                        if look >= 0 else "above alpha      ")
        looks = " ".join(f"{p:.4f}" for p in e.pvalues)
        lines.append(f"  {e.label:8s}  {e.start:5d}  {e.edge:12s}  {e.p_cap:.4f}   "
                     f"{e.holm_share / ALPHA:5.3f}       {cols[0]:23s}  {cols[1]:16s}  {looks}")
    return lines


def summary(splits: list[list[Edge]], stages: dict[str, Stages]) -> list[str]:
    """Over the splits: how often every edge of the grid's answer could be decided with no
    more share than the grid's Holm gave it, and the needed share over the Holm share."""
    lines = []
    for kind in KINDS:
        within, needs, ratios = [], [], []
        for edges in splits:
            need = [needed_share(e.pvalues, stages[kind])[0] for e in edges]
            needs += [n / ALPHA for n in need]
            ratios += [n / e.holm_share for n, e in zip(need, edges, strict=True)]
            within.append(all(n <= e.holm_share for n, e in zip(need, edges, strict=True)))
        lines.append(f"  {kind}: every edge decidable within the share the grid's Holm gave "
                     f"it in {np.mean(within):.3f} of splits; over {len(needs)} edge cells "
                     f"({int(np.sum(~np.isfinite(needs)))} need more than alpha), quartiles of")
        lines.append(f"    the share needed: {quartiles(needs)}; of it over the grid's Holm "
                     f"share: {quartiles(ratios)}")
    return lines


def quartiles(values: list[float]) -> str:
    finite = np.array(values)[np.isfinite(values)]
    return " ".join(f"{q:.3f}" for q in np.quantile(finite, [0.25, 0.5, 0.75]))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    split_arguments(parser, 200, HERE / "results" / "edge_shares.txt")
    args = parser.parse_args()
    stages = {kind: Stages(tuple(fe.STAGES), kind) for kind in KINDS}
    lines = [f"# edge shares ({time.strftime('%Y-%m-%d %H:%M')}, {os.cpu_count()} cores, "
             f"--splits {args.splits}, random splits from seed {args.seed}; alpha {ALPHA}, "
             f"stages {fe.STAGES}, union spending)", "",
             "Shares are fractions of alpha. 'Holm gave': alpha / (m - i + 1) at the Holm step "
             "that rejected the cell in the grid; 'needs': the smallest share with which some "
             "look of the sequential test crosses on the same seeds, and at which look."]
    for name in args.only:
        print(f"{name}:", flush=True)
        data = pooled(name, Path(args.results_dir))
        seeds = sorted(int(s) for s in data.runs.seed.unique())
        splits = []
        started = time.perf_counter()
        for k, order in enumerate(split_orders(seeds, args.splits, args.seed)):
            splits.append(grid_edges(data, order[:fe.CAP], stages["obrien_fleming"]))
            if (k + 1) % 50 == 0:
                print(f"  {k + 1}/{args.splits} splits, {time.perf_counter() - started:.0f} s",
                      flush=True)
        lines += ["", f"## {name}", "  seeds 0..15 (the grid fewer_epochs.py compared):",
                  *cell_lines(splits[0], stages),
                  f"  over {args.splits} splits of 32 seeds into halves of {fe.CAP}:",
                  *summary(splits, stages)]
        print("\n".join(lines), flush=True)
    Path(args.out).write_text("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
