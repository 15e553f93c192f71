"""Adaptive design against the full grid: same boundary, fewer branch epochs?

For each configuration, trains the full grid of window starts at a fixed resolution with
``seeds`` seeds (an ordinary sweep), labels each start critical / safe / undetermined at the
tolerance, then runs the adaptive design at the same resolution and seed cap **in the same
folder**. Every run the adaptive design asks for is a run the grid already trained (exact
branching makes them the same runs), so its cost is counted, not re-timed: branch epochs =
sum over the starts it measured of (epochs after the start) x (seeds it used there).

    python benchmarks/adaptive_vs_grid.py [--results-dir DIR] [--seeds 10]
                                          [--only NAME ...] (default: all six)
"""

from __future__ import annotations

import argparse
import itertools
import tempfile
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd

from periodscan.api import load_sweep
from periodscan.designs.adaptive_search import boundaries
from periodscan.jobs.sweep import run_sweep

HERE = Path(__file__).resolve().parent

CONFIGS = {
    # The demo: mnist1d signals, CNN1d, blur sigma 2 for 15 epochs of 60.
    "demo": dict(overrides=[], length=15, epochs=60, starts=list(range(0, 41, 5)),
                 initial_step=20, tolerance=0.5, folder="demo"),
    # Same data and model, a label-side deficit: 40% of training labels wrong for 15 epochs.
    "noise40": dict(overrides=["deficit=label_noise", "deficit.rate=0.4"], length=15, epochs=60,
                    starts=list(range(0, 36, 5)), initial_step=20, tolerance=0.5,
                    folder="noise40"),
    # The same runs asked a stricter question (damage above 1 point); reuses the demo's runs.
    "demo-tol1": dict(overrides=[], length=15, epochs=60, starts=list(range(0, 41, 5)),
                      initial_step=20, tolerance=1.0, folder="demo"),
    # The same two at a 2-epoch resolution: a grid of 21 (18) starts, where bisection should pay.
    # They reuse the 5-epoch runs above wherever the starts coincide.
    "demo-fine": dict(overrides=[], length=15, epochs=60, starts=list(range(0, 41, 2)),
                      initial_step=20, tolerance=0.5, folder="demo", resolution=2),
    "noise40-fine": dict(overrides=["deficit=label_noise", "deficit.rate=0.4"], length=15,
                         epochs=60, starts=list(range(0, 35, 2)), initial_step=20,
                         tolerance=0.5, folder="noise40", resolution=2),
    # scikit-learn's digits, MLP, blur sigma 2 for 10 epochs of 40 (validation study preset).
    "digits": dict(overrides=["experiment=validation_digits_blur"], length=10, epochs=40,
                   starts=list(range(0, 26, 5)), initial_step=10, tolerance=0.5,
                   folder="digits"),
}


def grid_branch_epochs(epochs: int, starts: list[int], seeds: int) -> int:
    """Epochs a full grid of one length trains after each window start, over its seeds."""
    return sum(epochs - s for s in starts) * seeds


def run_adaptive(overrides: list[str]) -> SimpleNamespace:
    """The sweep job on design=adaptive, with what the comparison reads from its design."""
    outcome = run_sweep(overrides, quiet=True)
    with load_sweep(outcome.folder) as view:
        seeds = view.design.seeds_per_start
        epochs = view.schedule_epochs
    critical_until, safe_from = boundaries(outcome.table)
    return SimpleNamespace(
        table=outcome.table, seeds_per_start=seeds, critical_until=critical_until,
        safe_from=safe_from, rounds=sum(n.startswith("round ") for n in outcome.notes),
        branch_epochs=sum((epochs - s) * n for s, n in seeds.items()))


def compare(name: str, spec: dict, results_dir: str, seeds: int) -> list[str]:
    common = [*spec["overrides"], f"results_dir={results_dir}", f"name=adaptive-{spec['folder']}",
              f"tolerance={spec['tolerance']}"]
    started = time.perf_counter()
    grid = run_sweep([*common, f"design.starts={spec['starts']}",
                      f"design.lengths=[{spec['length']}]", f"seeds={seeds}"], quiet=True)
    grid_seconds = time.perf_counter() - started
    grid_edges = boundaries(grid.table)
    adaptive = run_adaptive([*common, "design=adaptive", f"design.length={spec['length']}",
                             f"design.resolution={spec.get('resolution', 5)}",
                             f"design.initial_step={spec['initial_step']}",
                             "design.first_start=0", f"design.last_start={spec['starts'][-1]}",
                             "design.seeds_initial=3", f"design.seeds_max={seeds}"])
    grid_epochs = grid_branch_epochs(spec["epochs"], spec["starts"], seeds)
    trained = grid.counts["done"]
    grid_wall = (f"{grid_seconds:.0f} s wall" if trained else
                 "runs already in the results folder")
    verdicts = " ".join(f"{s}:{v[0]}" for s, v in zip(grid.table.start, grid.table.verdict,
                                                      strict=True))
    adaptive_verdicts = " ".join(
        f"{s}:{v[0]}x{adaptive.seeds_per_start[s]}"
        for s, v in zip(adaptive.table.start, adaptive.table.verdict, strict=True))
    same = (adaptive.critical_until, adaptive.safe_from) == grid_edges
    return [
        f"## {name}: {spec['length']}-epoch deficit, tolerance {spec['tolerance']} points, "
        f"starts {spec['starts'][0]}..{spec['starts'][-1]} every {spec.get('resolution', 5)} "
        "epochs",
        f"grid      : {len(spec['starts'])} starts x {seeds} seeds, {grid_epochs} branch epochs "
        f"({grid_wall}); verdicts {verdicts}",
        f"            latest critical start {grid_edges[0]}, safe from {grid_edges[1]}",
        f"adaptive  : {adaptive.rounds} rounds, {len(adaptive.seeds_per_start)} starts, "
        f"{adaptive.branch_epochs} branch epochs; verdicts (start:verdict x seeds) "
        f"{adaptive_verdicts}",
        f"            latest critical start {adaptive.critical_until}, safe from "
        f"{adaptive.safe_from}",
        f"same boundary: {same}; branch epochs adaptive / grid = "
        f"{adaptive.branch_epochs / grid_epochs:.2f} (target <= 0.50)",
        screen_errors(grid.runs, grid.table, spec["tolerance"], 3, spec["epochs"]),
        "",
    ]


def screen_errors(runs: pd.DataFrame, table: pd.DataFrame, tolerance: float, first: int,
                  epochs: int) -> str:
    """How often the interim screen would misjudge a start the grid settled at the cap.

    For every start the grid calls critical: the share of all ``first``-seed subsets of its
    seeds whose mean damage is at or below the tolerance (the screen would drop it as a
    critical candidate); for every safe start, the share at or above (it would block the safe
    stretch). Subsets stand in for other draws of the first seeds.
    """
    runs = runs[(runs.end_epoch == epochs) & (runs.status == "done")]
    base = runs[runs.is_baseline == 1].set_index("seed").test_acc
    counts = {"critical": [0, 0], "safe": [0, 0]}
    for row in table.itertuples():
        if row.verdict not in counts:
            continue
        window = runs[(runs.is_baseline == 0) & (runs.start_epoch == row.start)
                      & (runs.length == row.length)].set_index("seed").test_acc
        damage = 100 * (base.loc[window.index] - window).to_numpy()
        means = np.array([damage[list(c)].mean()
                          for c in itertools.combinations(range(len(damage)), first)])
        wrong = means <= tolerance if row.verdict == "critical" else means >= tolerance
        counts[row.verdict][0] += int(wrong.sum())
        counts[row.verdict][1] += len(means)
    parts = [f"{kind} starts {w}/{n} = {w / n:.3f}" if n else f"no {kind} start"
             for kind, (w, n) in counts.items()]
    return (f"screen at {first} seeds misjudges ({first}-seed subsets of the grid's seeds): "
            + "; ".join(parts))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--results-dir", default=None,
                        help="keep the sweeps here (default: a temporary folder)")
    parser.add_argument("--only", choices=list(CONFIGS), nargs="+",
                        default=list(CONFIGS))
    parser.add_argument("--seeds", type=int, default=10,
                        help="seeds of the grid, and the adaptive design's seed cap (default 10)")
    parser.add_argument("--out", default=str(HERE / "results" / "adaptive_vs_grid.txt"))
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = args.results_dir or tmp
        lines = [f"# adaptive design vs full grid ({time.strftime('%Y-%m-%d %H:%M')})", ""]
        for name in args.only:
            block = compare(name, CONFIGS[name], folder, args.seeds)
            print("\n".join(block), flush=True)
            lines += block
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text("\n".join(lines) + "\n")
    print(f"written to {args.out}")


if __name__ == "__main__":
    main()
