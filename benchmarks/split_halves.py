"""How often does a 16-seed answer repeat, and how often does the sequential design give the
grid's answer? Measured on many splits of 32 trained seeds, with no training of its own.

``fewer_epochs.py --ways grid fresh`` trains the tree grid on seeds 0..15 and 16..31. Every run
the grid or the sequential design would train on any 16 of those seeds is among them (exact
branching), so both can be replayed in memory on any split of the 32 seeds into two halves A
and B. For each split, with A's seeds in a random order:

* **grid A = grid B**: the grid gives the same planner answer on two disjoint sets of 16 seeds
  (same critical window and safe-from on every level, B's best slot safe in A);
* **seq A = grid A**: the sequential design on A (seeds added in A's order) gives the answer
  of the grid on the same 16 seeds: the criterion of issue 15, one sample per split;
* **seq A = grid B**: the same against a grid on other seeds, to set beside grid A = grid B;
* **close**: the same, but each edge (first and last critical start, safe-from) may differ by
  one step of the grid of starts;
* the sequential design's epochs (trunks plus branches) over the naive grid's;
* against the grid on all 32 seeds: the share of its decided cells each half-answer decides,
  and how many cells get the opposite verdict.

The sequential design is replayed twice on each split: as ``fewer_epochs.py`` trained it (alpha
in even shares over the candidate starts, Holm) and with ``design.alpha_passing=bisection``
(the first pass's starts hold alpha and pass it down the bisection). With ``--settings`` it is
also replayed with other settings on top of the bisection's shares (futility off, Pocock-type
spending, stages 4, 8, 16, a first pass every 6 epochs instead of 10, or 8 instead of 12, and
each start's severity levels searched from the middle level, ``design.level_search=middle``,
also with even shares), each on the same splits. ``--ways`` replays only the ways it names.

Split 0 is seeds 0..15 against 16..31 in order, the pair ``fewer_epochs.py`` trained; the
script checks that its replay gives the stored sequential sweep's answer and epochs.

The shares are averages over splits of the same 32 seeds: they estimate what two 16-seed draws
from these seeds would do. The interval printed beside each (Clopper-Pearson over the splits)
is the Monte Carlo error of that average only; it says nothing about seeds beyond these 32.

    python benchmarks/split_halves.py [--only demo noise40 severity] [--splits 400]
                                      [--settings | --ways WAY ...] [--results-dir /work/bench]
                                      [--out FILE]
"""

from __future__ import annotations

import argparse
import os
import random
import time
from dataclasses import dataclass, field
from pathlib import Path

import fewer_epochs as fe
import numpy as np
import pandas as pd
from scipy import stats

from periodscan.designs import load_design
from periodscan.engine.tree import build_tree
from periodscan.jobs.prepare import Prepared, prepare

HERE = Path(__file__).resolve().parent
#: The sequential design replayed on each split (changes to fewer_epochs.py's block): as
#: fewer_epochs.py trained it (even shares of alpha, Holm), and with the bisection's shares.
WAYS = {"even (as trained)": {}, "bisection": {"alpha_passing": "bisection"}}
#: With --settings, other settings on top of the bisection's shares too.
SETTINGS = {**WAYS,
            **{f"bisection, {name}": {"alpha_passing": "bisection", **change} for name, change in {
                "futility off": {"futility": 0.0}, "pocock": {"spending": "pocock"},
                "stages 4,8,16": {"stages": [4, 8, 16]},
                "first pass finer": {"initial_step": "finer"},
                "middle level first": {"level_search": "middle"}}.items()},
            "even, middle level first": {"level_search": "middle"}}
LABEL = max(map(len, SETTINGS))  # width of the first column
#: "finer": a first pass every 6 epochs where fewer_epochs.py uses 10 (every 8 where 12).
FINER = {10: 6, 12: 8}


@dataclass
class Pooled:
    """Every run and epoch record of the two 16-seed grids of one configuration."""

    runs: pd.DataFrame
    epochs: pd.DataFrame
    classes: int | None
    grid: Prepared
    seq: Prepared
    naive_epochs: int
    step: int
    initial_step: int

    def design(self, prep: Prepared, seeds: list[int], change: dict | None = None):
        """The prepared design again, told to use ``seeds`` in this order (and ``change`` to
        its design block)."""
        plain = {**prep.plain, "seeds": list(seeds),
                 "design": {**prep.plain["design"], **(change or {})}}
        return load_design(plain, list(seeds))

    def grid_answer(self, seeds: list[int]) -> dict:
        return fe.answer_on(self.design(self.grid, seeds), self.runs, self.epochs, self.classes)

    def seq_answer(self, seeds: list[int], change: dict | None = None) -> tuple[dict, int]:
        """The sequential design replayed on ``seeds``: its answer and the epochs it trains."""
        design = self.design(self.seq, seeds, change)
        trained = []
        for runs in design.rounds(lambda: self.runs):
            trained += runs
        answer = fe.answer_on(design, self.runs, self.epochs, self.classes, design.last_table)
        return answer, build_tree(trained, self.seq.identity).epochs_shared


@dataclass
class Way:
    """What one answer gave over the splits."""

    same: list[bool] = field(default_factory=list)
    close: list[bool] = field(default_factory=list)
    same_other: list[bool] = field(default_factory=list)
    ratio: list[float] = field(default_factory=list)
    decided: list[float] = field(default_factory=list)
    opposite: int = 0

    def add(self, grid_a: dict, answer: dict, reference: dict, step: int,
            other: dict | None = None) -> None:
        """One split: ``answer`` against the grid on the same half (and on the ``other``)."""
        self.same.append(fe.tally(grid_a, answer)[0])
        self.close.append(close_answer(grid_a, answer, step))
        if other is not None:
            self.same_other.append(fe.tally(other, answer)[0])
        _, opposite, decided, total = fe.tally(reference, answer)
        self.opposite += opposite
        self.decided.append(decided / max(total, 1))


def pooled(name: str, root: Path) -> Pooled:
    config = fe.CONFIGS[name]
    folders = [Path(fe._record(root, name, way)["folder"]) for way in ("grid", fe.FRESH)]
    runs, epochs, classes = fe.pooled_records(folders)
    return Pooled(runs=runs, epochs=epochs, classes=classes,
                  grid=prepare(fe.grid_overrides(root / "grid", name, config)),
                  seq=prepare(fe.sequential_overrides(root / "seq", name, config)),
                  naive_epochs=fe._record(root, name, "naive")["epochs"],
                  step=config["resolution"], initial_step=config["initial_step"])


def check_replay(data: Pooled, name: str, root: Path) -> str:
    """Split 0 replayed must be the sequential sweep fewer_epochs.py trained."""
    answer, epochs = data.seq_answer(list(range(fe.CAP)))
    stored = fe._record(root, name, "seq")
    same = answer == fe.answers(Path(stored["folder"])) and epochs == stored["epochs"]
    if not same:
        raise SystemExit(f"{name}: the replay of seeds 0..{fe.CAP - 1} differs from the "
                         f"stored sequential sweep ({epochs} epochs, stored {stored['epochs']})")
    return f"replay of seeds 0..{fe.CAP - 1}: the stored sequential answer, {epochs} epochs"


def close_answer(ref: dict, other: dict, step: int) -> bool:
    """On every level: each edge within ``step`` epochs of the reference's (or both missing),
    and the other's best slot safe in the reference (or both without one)."""
    def near(a, b) -> bool:
        if a is None or b is None:
            return a is None and b is None
        return all(abs(x - y) <= step for x, y in zip(np.atleast_1d(a), np.atleast_1d(b),
                                                       strict=True))
    for level, r in ref.items():
        o = other[level]
        if not (near(r["window"], o["window"]) and near(r["safe_from"], o["safe_from"])
                and fe.same_answer(r, o)[1]):
            return False
    return True


def split_orders(seeds: list[int], splits: int, seed: int):
    """The seeds in the order of each split (its first half is A, in that order): split 0 in
    order, the others shuffled from ``seed``."""
    rng = random.Random(seed)
    for k in range(splits):
        yield list(seeds) if k == 0 else rng.sample(seeds, len(seeds))


def split_arguments(parser: argparse.ArgumentParser, splits: int, out: Path) -> None:
    """The options every script reading fewer_epochs.py's stored grids takes."""
    parser.add_argument("--only", nargs="+", choices=list(fe.CONFIGS), default=list(fe.CONFIGS))
    parser.add_argument("--splits", type=int, default=splits)
    parser.add_argument("--seed", type=int, default=0, help="of the random splits")
    parser.add_argument("--results-dir", default="/work/bench",
                        help="where fewer_epochs.py kept its ways grid, fresh, seq and naive")
    parser.add_argument("--out", default=str(out))


def run_splits(data: Pooled, splits: int, seed: int, settings: dict) -> dict[str, Way]:
    seeds = sorted(int(s) for s in data.runs.seed.unique())
    reference = fe.answer_on(data.design(data.grid, seeds), data.runs, data.epochs,
                             data.classes)
    changes = {name: {k: FINER[data.initial_step] if v == "finer" else v
                      for k, v in change.items()} for name, change in settings.items()}
    ways = {"grid": Way(), **{name: Way() for name in changes}}
    started = time.perf_counter()
    for k, order in enumerate(split_orders(seeds, splits, seed)):
        a, b = order[:fe.CAP], order[fe.CAP:]
        grid_a, grid_b = data.grid_answer(sorted(a)), data.grid_answer(sorted(b))
        ways["grid"].add(grid_a, grid_b, reference, data.step)
        for name, change in changes.items():
            answer, epochs = data.seq_answer(a, change)
            ways[name].add(grid_a, answer, reference, data.step, other=grid_b)
            ways[name].ratio.append(epochs / data.naive_epochs)
        if (k + 1) % 50 == 0:
            print(f"  {k + 1}/{splits} splits, {time.perf_counter() - started:.0f} s", flush=True)
    return ways


def share(flags: list[bool]) -> str:
    hits, n = int(sum(flags)), len(flags)
    low, high = stats.binomtest(hits, n).proportion_ci(0.95, method="exact")
    return f"{hits / n:.3f} ({low:.3f}-{high:.3f})"


def report(name: str, ways: dict[str, Way], replay: str, splits: int, step: int) -> list[str]:
    grid = ways["grid"]
    lines = [f"## {name}: {splits} splits of 32 seeds into two halves of {fe.CAP}", f"  {replay}",
             "  shares of splits, 95% Monte Carlo interval in brackets; 'close': every edge "
             f"within {step} epochs (one step of the grid of starts)",
             f"  grid A = grid B: same {share(grid.same)}, close {share(grid.close)}; a 16-seed "
             f"grid decides {np.mean(grid.decided):.2f} of the 32-seed grid's decided cells, "
             f"opposite verdicts {grid.opposite}",
             f"  {'sequential on A':{LABEL}s}  same as grid A         close to grid A        "
             "same as grid B         epochs/naive  <= 1/5                 decided  opposite"]
    for label, way in ways.items():
        if label == "grid":
            continue
        lines.append(f"  {label:{LABEL}s}  {share(way.same):21s}  {share(way.close):21s}  "
                     f"{share(way.same_other):21s}  {np.mean(way.ratio):12.3f}  "
                     f"{share(list(np.array(way.ratio) <= 0.2)):21s}  "
                     f"{np.mean(way.decided):7.2f}  {way.opposite:8d}")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    split_arguments(parser, 400, HERE / "results" / "split_halves.txt")
    parser.add_argument("--settings", action="store_true",
                        help="replay the sequential design with other settings too")
    parser.add_argument("--ways", nargs="+", choices=list(SETTINGS), metavar="WAY",
                        help="replay only these ways of the sequential design (names as in "
                             "the report's first column)")
    args = parser.parse_args()
    root = Path(args.results_dir)
    settings = SETTINGS if args.settings else WAYS
    if args.ways:
        settings = {name: SETTINGS[name] for name in args.ways}
    lines = [f"# split halves ({time.strftime('%Y-%m-%d %H:%M')}, {os.cpu_count()} cores, "
             f"random splits from seed {args.seed})", ""]
    for name in args.only:
        print(f"{name}:", flush=True)
        data = pooled(name, root)
        replay = check_replay(data, name, root)
        ways = run_splits(data, args.splits, args.seed, settings)
        lines += [*report(name, ways, replay, args.splits, data.step), ""]
        print("\n".join(lines), flush=True)
    Path(args.out).write_text("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
