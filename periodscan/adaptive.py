"""The adaptive design: find the edges of the critical window with as few runs as possible.

For one deficit length and the sweep's tolerance, a coarse pass measures every
``initial_step``-th window start with ``seeds_initial`` seeds. Each round then

* adds seeds (``seeds_step`` at a time, up to ``seeds_max``) to starts whose verdict is still
  undetermined, i.e. whose interval straddles the tolerance, and
* adds the midpoint between two neighbouring measured starts whose verdicts differ, down to
  ``resolution`` epochs apart,

until nothing changes. Every round is an ordinary sweep of the same training config in the same
folder, so runs, trunks and checkpoints from earlier rounds are reused, and each run is the very
run a full grid would train (exact branching).

The refinement assumes the verdict changes only a few times along the start axis: a critical
stretch narrower than ``initial_step`` that falls between two safe coarse starts is missed.
Choose ``initial_step`` below the narrowest stretch you care about.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import pandas as pd
from omegaconf import DictConfig, OmegaConf

from periodscan.analysis.sensitivity import sensitivity_table
from periodscan.analysis.verdicts import CRITICAL, SAFE
from periodscan.config import _int, results_folder, to_plain
from periodscan.errors import ConfigError, bad_value
from periodscan.ledger import Ledger
from periodscan.sweep import plain_config, run_sweep


@dataclass
class AdaptiveOutcome:
    """The boundary found, the final table and what it cost."""

    length: int
    tolerance: float
    critical_until: int | None  # latest start judged critical
    safe_from: int | None  # earliest start from which every measured start is safe
    table: pd.DataFrame
    seeds_per_start: dict[int, int]
    rounds: int
    branch_epochs: int  # epochs of window runs after their start (what a grid pays per start)
    history: list[str] = field(default_factory=list)


def _settings(plain: dict[str, Any]) -> dict[str, Any]:
    """Validate the adaptive design block; return it with defaults resolved."""
    design = dict(plain["design"])
    epochs = int(plain["schedule"]["epochs"])
    length = _int(design.get("length"), "design.length", 1)
    if length > epochs:
        raise bad_value("design.length", f"an int <= schedule.epochs ({epochs})", length)
    if design.get("budget", "fixed_total") != "fixed_total":
        raise bad_value("design.budget", "'fixed_total' for the adaptive design",
                        design.get("budget"))
    resolution = _int(design.get("resolution", 1), "design.resolution", 1)
    step = _int(design.get("initial_step", 8), "design.initial_step", 1)
    if step % resolution:
        raise bad_value("design.initial_step", f"a multiple of design.resolution ({resolution})",
                        step)
    first = _int(design.get("first_start", 0), "design.first_start", 0)
    last = design.get("last_start")
    # Default: the latest start that still leaves a tenth of the schedule to recover (the
    # short_recovery rule of the sensitivity table), so the edge is not set by unfinished
    # recovery at the very end.
    default_last = max(first, epochs - length - math.ceil(epochs / 10))
    last = default_last if last is None else _int(last, "design.last_start", first)
    if last > epochs - length:
        raise bad_value("design.last_start",
                        f"an int <= {epochs - length} (windows must end by epoch {epochs})",
                        last)
    seeds_initial = _int(design.get("seeds_initial", 3), "design.seeds_initial", 2)
    seeds_max = _int(design.get("seeds_max", 8), "design.seeds_max", seeds_initial)
    seeds_step = _int(design.get("seeds_step", 2), "design.seeds_step", 1)
    max_rounds = _int(design.get("max_rounds", 12), "design.max_rounds", 1)
    tolerance = plain.get("tolerance")
    if not isinstance(tolerance, (int, float)) or isinstance(tolerance, bool):
        raise bad_value("tolerance", "a number (accuracy points) for the adaptive design",
                        tolerance)
    return dict(length=length, resolution=resolution, step=step, first=first, last=last,
                seeds_initial=seeds_initial, seeds_max=seeds_max, seeds_step=seeds_step,
                max_rounds=max_rounds, tolerance=float(tolerance), epochs=epochs)


def _grid(first: int, last: int, resolution: int) -> list[int]:
    return list(range(first, last + 1, resolution))


def _coarse(first: int, last: int, step: int) -> list[int]:
    starts = list(range(first, last + 1, step))
    return starts if starts[-1] == last else [*starts, last]


def coarse_config(config: DictConfig) -> DictConfig:
    """The first round as an ordinary window sweep (what ``--dry-run`` describes)."""
    plain = to_plain(config)
    settings = _settings(plain)
    first = OmegaConf.create(plain)
    first.design = {"kind": "window", "budget": "fixed_total", "recovery_epochs": None,
                    "starts": _coarse(settings["first"], settings["last"], settings["step"]),
                    "lengths": [settings["length"]]}
    first.seeds = settings["seeds_initial"]
    return first


def _run_round(base: dict[str, Any], seeds: dict[int, int], length: int, quiet: bool) -> None:
    """One ordinary window sweep per group of starts that want the same number of seeds."""
    groups: dict[int, list[int]] = {}
    for start, n in seeds.items():
        groups.setdefault(n, []).append(start)
    for n, starts in sorted(groups.items()):
        config = OmegaConf.create(base)
        config.design = {"kind": "window", "starts": sorted(starts), "lengths": [length],
                         "budget": "fixed_total", "recovery_epochs": None}
        config.seeds = n
        run_sweep(config, quiet=quiet)


def _table(folder, settings, seeds: dict[int, int], confidence: float) -> pd.DataFrame:
    ledger = Ledger(folder)
    try:
        runs = ledger.runs_frame()
    finally:
        ledger.close()
    mine = runs[(runs.is_baseline == 1) |
                ((runs.length == settings["length"]) & runs.start_epoch.isin(list(seeds)))]
    mine = mine[mine.end_epoch == settings["epochs"]]
    keep = mine.apply(lambda r: r.is_baseline == 1 or r.seed < seeds[int(r.start_epoch)], axis=1)
    return sensitivity_table(mine[keep], settings["epochs"], confidence,
                             tolerance=settings["tolerance"])


def _refine(table: pd.DataFrame, seeds: dict[int, int], settings) -> dict[int, int]:
    """Starts to add and starts to give more seeds; empty when the boundary is settled."""
    verdict = dict(zip(table.start, table.verdict, strict=True))
    wanted: dict[int, int] = {}
    for start in seeds:
        if verdict.get(start) not in (CRITICAL, SAFE) and seeds[start] < settings["seeds_max"]:
            wanted[start] = min(seeds[start] + settings["seeds_step"], settings["seeds_max"])
    ordered = sorted(seeds)
    res = settings["resolution"]
    for a, b in zip(ordered, ordered[1:], strict=False):
        if verdict.get(a) != verdict.get(b) and b - a > res:
            middle = a + ((b - a) // 2 // res) * res
            if middle not in seeds and a < middle < b:
                wanted[middle] = settings["seeds_initial"]
    return wanted


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


def run_adaptive(config: DictConfig | dict | Sequence[str] = (),
                 quiet: bool = False) -> AdaptiveOutcome:
    """Run the adaptive design described by ``config`` (``design=adaptive``)."""
    plain = plain_config(config)
    if plain["design"].get("kind") != "adaptive":
        raise ConfigError("run_adaptive needs design.kind 'adaptive' (use design=adaptive)")
    settings = _settings(plain)
    confidence = float(plain.get("confidence", 0.95))
    folder = results_folder(plain)
    seeds = {s: settings["seeds_initial"]
             for s in _coarse(settings["first"], settings["last"], settings["step"])}
    outcome_history = []
    table = pd.DataFrame()
    rounds = 0
    todo = dict(seeds)
    while todo and rounds < settings["max_rounds"]:
        rounds += 1
        _run_round(plain, seeds, settings["length"], quiet)
        table = _table(folder, settings, seeds, confidence)
        todo = _refine(table, seeds, settings)
        counts = ", ".join(f"{s}:{seeds[s]}" for s in sorted(seeds))
        outcome_history.append(f"round {rounds}: starts:seeds {counts}; next {todo or 'none'}")
        if not quiet:
            print(outcome_history[-1], flush=True)
        seeds.update(todo)
    critical_until, safe_from = boundaries(table)
    _write(folder, table, plain)
    epochs = settings["epochs"]
    branch = sum((epochs - s) * n for s, n in seeds.items() if s in set(table.start))
    return AdaptiveOutcome(settings["length"], settings["tolerance"], critical_until, safe_from,
                           table, {int(s): int(n) for s, n in seeds.items()}, rounds, branch,
                           outcome_history)


def _write(folder, table: pd.DataFrame, plain: dict[str, Any]) -> None:
    """The adaptive table replaces the last round's partial outputs in the sweep folder."""
    from periodscan.engine.checkpoint import write_atomic
    from periodscan.plots import sensitivity_curve
    from periodscan.sweep import CURVE_PNG, TABLE_CSV, describe

    write_atomic(folder / TABLE_CSV, table.to_csv(index=False, float_format="%.6g").encode())
    if len(table):
        sensitivity_curve(table, folder / CURVE_PNG, title=describe(plain) + " (adaptive)",
                          tolerance=plain.get("tolerance"))


def grid_branch_epochs(epochs: int, starts: Sequence[int], seeds: int) -> int:
    """Epochs a full grid of one length trains after each window start, over its seeds."""
    return sum(epochs - s for s in starts) * seeds
