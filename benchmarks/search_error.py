"""Wrong verdicts of the whole sequential search, by simulation: starts chosen by the data.

benchmarks/sequential_error.py checks the staged test on windows fixed in advance. The
sequential design does more: which starts it measures, and when, depends on what it has seen.
Here that loop runs on synthetic damages, both ways of sharing alpha over the candidate starts
(``design.alpha_passing``: ``even``, Holm over every candidate start; ``bisection``, the first
pass's starts share it and a decided start passes it down the bisection) on the same draws.

Per sequence: 20 candidate starts (0..38 every 2, a first pass every 10: 0, 10, 20, 30, 38),
stages 3, 5, 8, 12, 16, O'Brien-Fleming-type spending, futility 0.1, tolerance 0.5, alpha 0.05.
A seed's damage at start s is mu_s + e(s, seed) - b(seed): the baseline term b is shared by
every start of a seed, as in a real sweep (each window is compared with the same baseline run),
so the starts' tests are correlated. Profiles of the true mean damage mu_s:

* ``flat``: every start exactly at the tolerance (any verdict is wrong);
* ``edge``: starts 0-8 far above the tolerance, 10-18 at it, 20-38 far below (a verdict at
  10-18 is wrong, and so is a wrong-direction verdict elsewhere);
* ``ramp``: damage falling steadily from 2.1 points at start 0, crossing the tolerance at
  start 14, which sits exactly at it (a verdict at 14 is wrong, and so is a wrong direction).

The loop is ``SequentialDesign.rounds`` without its runs tables: each window's verdict from
``staged_verdicts.decide``, the next round from ``staged_search.known_cell`` and ``next_seeds``.

    python benchmarks/search_error.py [--sequences 20000]
"""

from __future__ import annotations

import argparse
import datetime
import math
import os
import time
from pathlib import Path

import numpy as np
from scipy import stats

from periodscan.analysis.sequential import Stages
from periodscan.analysis.staged_verdicts import DECIDED, FUTILE, StagedRule, crossings, decide
from periodscan.analysis.stats import TTest
from periodscan.designs.staged_search import (
    CRITICAL,
    SAFE,
    bisection_graph,
    known_cell,
    next_seeds,
)

GRID = list(range(0, 40, 2))
COARSE = [0, 10, 20, 30, 38]
RESOLUTION = 2
STAGES = Stages((3, 5, 8, 12, 16))
TOLERANCE, ALPHA, FUTILITY = 0.5, 0.05, 0.1
WINDOW_SD, BASELINE_SD = 0.6, 0.5  # points; the damage's spread per seed is about 0.78
FAR = 2.5  # points from the tolerance for "far" starts
PASSINGS = ("even", "bisection")
RESULTS = Path(__file__).resolve().parent / "results" / "search_error.txt"


def profiles() -> dict[str, np.ndarray]:
    """True mean damage per start of each profile, and below it which starts sit at the
    tolerance (true nulls)."""
    s = np.asarray(GRID, dtype=float)
    return {
        "flat": np.full(len(GRID), TOLERANCE),
        "edge": np.where(s < 10, TOLERANCE + FAR, np.where(s < 20, TOLERANCE, TOLERANCE - FAR)),
        "ramp": TOLERANCE + (14 - s) * 0.115,
    }


def rule(passing: str) -> StagedRule:
    graph = bisection_graph(GRID, COARSE, RESOLUTION) if passing == "bisection" else None
    return StagedRule(stages=STAGES, tolerance=TOLERANCE, confidence=1 - ALPHA,
                      futility=FUTILITY, family_size=len(GRID), graph=graph,
                      family=tuple(GRID))


def draw(rng: np.random.Generator, means: np.ndarray) -> np.ndarray:
    """Damages, starts x seeds, with the baseline term shared by the starts of a seed."""
    window = rng.normal(0.0, WINDOW_SD, (len(GRID), STAGES.cap))
    return means[:, None] + window - rng.normal(0.0, BASELINE_SD, STAGES.cap)[None, :]


def looks(damages: np.ndarray) -> list[list[TTest]]:
    """The t test of every start at every stage, at once (as ``t_test_vs`` one by one; the
    draws are continuous, so no spread is zero)."""
    n = np.asarray(STAGES.seeds)
    sums = np.cumsum(damages, axis=1)[:, n - 1]
    squares = np.cumsum(damages ** 2, axis=1)[:, n - 1]
    mean = sums / n
    sd = np.sqrt((squares - n * mean ** 2) / (n - 1))
    stat = (mean - TOLERANCE) / (sd / np.sqrt(n))
    p = 2 * stats.t.sf(np.abs(stat), n - 1)
    return [[TTest(float(mean[i, k]), float(sd[i, k]), int(n[k]), float(stat[i, k]),
                   float(p[i, k])) for k in range(len(n))] for i in range(len(damages))]


def search(damages: np.ndarray, judge: StagedRule, max_rounds: int = 30) -> tuple[dict, int]:
    """One sequential sweep on ``damages``: the verdict of each measured start and the
    window-seeds it used."""
    row = {s: i for i, s in enumerate(GRID)}
    all_looks = looks(damages)
    cells = {s: STAGES.seeds[0] for s in COARSE}
    futile: set[int] = set()
    for _ in range(max_rounds):
        starts = sorted(cells)
        tests = {s: all_looks[row[s]][:STAGES.seeds.index(cells[s]) + 1] for s in starts}
        pvalues = [[t.pvalue if np.isfinite(t.pvalue) else 1.0 for t in tests[s]]
                   for s in starts]
        crossed, _, hopes = crossings(pvalues, starts, judge)
        verdict, stopped = {}, {}
        for s, look, hope in zip(starts, crossed, hopes, strict=True):
            verdict[s], stopped[s] = decide(tests[s], look, hope, judge)
            if stopped[s] != DECIDED and s in futile:
                stopped[s] = FUTILE  # sticky, as in the design
        futile |= {s for s in starts if stopped[s] == FUTILE}
        known = {(s, 0): known_cell(verdict[s], stopped[s], tests[s][-1].mean, TOLERANCE)
                 for s in starts}
        todo = next_seeds({(s, 0): n for s, n in cells.items()}, known, STAGES, 1, RESOLUTION)
        todo = {s: n for (s, _level), n in todo.items()}
        if not todo:
            break
        cells.update(todo)
    return verdict, sum(cells.values())


def wrong(verdict: dict, means: np.ndarray) -> bool:
    """Any verdict at a start exactly at the tolerance, or any in the wrong direction."""
    for s, v in verdict.items():
        mu = means[GRID.index(s)]
        if v in (CRITICAL, SAFE) and (mu == TOLERANCE or (v == CRITICAL) != (mu > TOLERANCE)):
            return True
    return False


def simulate(profile: str, sequences: int, seed: int = 0) -> dict[str, dict[str, float]]:
    """Per passing: wrong-verdict rate, decided starts and window-seeds per sequence (mean)."""
    means = profiles()[profile]
    rng = np.random.default_rng(seed)
    rules = {p: rule(p) for p in PASSINGS}
    out = {p: {"wrong": 0, "decided": 0, "seeds": 0} for p in PASSINGS}
    for _ in range(sequences):
        damages = draw(rng, means)
        for passing, judge in rules.items():
            verdict, seeds = search(damages, judge)
            out[passing]["wrong"] += wrong(verdict, means)
            out[passing]["decided"] += sum(v in (CRITICAL, SAFE) for v in verdict.values())
            out[passing]["seeds"] += seeds
    return {p: {k: v / sequences for k, v in r.items()} | {"wrong_count": r["wrong"]}
            for p, r in out.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sequences", type=int, default=20_000)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", default=str(RESULTS))
    args = parser.parse_args()
    lines = [f"# wrong verdicts of the sequential search ({datetime.date.today()}, "
             f"{os.cpu_count()} cores, {args.sequences} sequences per profile, alpha {ALPHA})",
             "", "profile  passing    wrong    95% interval       decided starts  window-seeds"]
    for k, profile in enumerate(profiles()):
        started = time.perf_counter()
        result = simulate(profile, args.sequences, args.seed + k)
        for passing, r in result.items():
            low, high = stats.binomtest(int(r["wrong_count"]), args.sequences).proportion_ci(
                0.95, method="exact")
            lines.append(f"{profile:8s} {passing:10s} {r['wrong']:.4f}   [{low:.4f}, "
                         f"{high:.4f}]   {r['decided']:14.2f}  {r['seeds']:12.1f}")
        print("\n".join(lines[-2:]), f"({time.perf_counter() - started:.0f} s)", flush=True)
    bound = ALPHA + 3 * math.sqrt(ALPHA * (1 - ALPHA) / args.sequences)
    lines += ["", f"every wrong-verdict rate must stay at or below alpha (here, with Monte Carlo "
                  f"slack of 3 SE: {bound:.4f})"]
    Path(args.out).write_text("\n".join(lines) + "\n")
    print("\n".join(lines))


if __name__ == "__main__":
    main()
