"""The adaptive design: find the edges of the critical window with as few runs as possible.

For one deficit length and the sweep's tolerance it works in two phases, each round an ordinary
sweep of the same training config in the same folder (runs, trunks and checkpoints of earlier
rounds are reused, and each run is the very run a full grid would train: exact branching).

1. *Locate* (cheap): every ``initial_step``-th start with ``seeds_initial`` seeds, then the
   midpoint between neighbouring starts whose mean damage falls on different sides of the
   tolerance, down to ``resolution`` epochs apart.
2. *Confirm*: verdicts are only taken at the seed cap (``seeds_max``). Starts from the last one
   whose mean is above the tolerance to the end are raised to the cap; if the latest of them is
   not critical at the cap, the start before it is raised too, until a critical start is reached
   (or the first start). Midpoints are added at the cap where two confirmed neighbours disagree.
   Seeds are thus added only where the boundary is decided; starts well inside the critical
   stretch keep ``seeds_initial`` seeds and are reported undetermined ("not confirmed").

Why verdicts only at the cap: stopping a start as soon as its interval clears the tolerance
(optional stopping) inflates the error rate of a fixed-level test, so every verdict here rests on
the fixed number ``seeds_max`` of seeds. Holm's correction is applied over the whole grid of
candidate starts (``first_start .. last_start`` every ``resolution``), the starts not measured at
the cap entering with p = 1: the adaptive design is never bolder than the full grid would be with
the same seeds, and with the same runs it can only call fewer windows critical or safe.

The search assumes the mean damage crosses the tolerance a few times at most along the start
axis: a critical stretch narrower than ``initial_step`` between two harmless coarse starts is
missed. Choose ``initial_step`` below the narrowest stretch you care about.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import pandas as pd
from omegaconf import DictConfig, OmegaConf

from periodscan.analysis.sensitivity import sensitivity_table
from periodscan.analysis.verdicts import CRITICAL, SAFE, UNDETERMINED
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
    max_rounds = _int(design.get("max_rounds", 12), "design.max_rounds", 1)
    tolerance = plain.get("tolerance")
    if not isinstance(tolerance, (int, float)) or isinstance(tolerance, bool):
        raise bad_value("tolerance", "a number (accuracy points) for the adaptive design",
                        tolerance)
    return dict(length=length, resolution=resolution, step=step, first=first, last=last,
                seeds_initial=seeds_initial, seeds_max=seeds_max,
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
    """Sensitivity table of the measured starts: verdicts only for starts at the seed cap.

    Capped starts are labelled with Holm's correction padded to the full candidate grid; the
    others are listed with their damage estimate, verdict undetermined and ``confirmed`` False.
    """
    ledger = Ledger(folder)
    try:
        runs = ledger.runs_frame()
    finally:
        ledger.close()
    mine = runs[(runs.is_baseline == 1) |
                ((runs.length == settings["length"]) & runs.start_epoch.isin(list(seeds)))]
    mine = mine[mine.end_epoch == settings["epochs"]]
    keep = mine.apply(lambda r: r.is_baseline == 1 or r.seed < seeds[int(r.start_epoch)], axis=1)
    mine = mine[keep]
    cap = settings["seeds_max"]
    capped = {s for s, n in seeds.items() if n >= cap}
    is_capped = mine.start_epoch.isin(list(capped))
    family = len(_grid(settings["first"], settings["last"], settings["resolution"]))
    parts = []
    if capped:
        part = sensitivity_table(mine[(mine.is_baseline == 1) | is_capped], settings["epochs"],
                                 confidence, tolerance=settings["tolerance"],
                                 family_size=family)
        parts.append(part.assign(confirmed=True))
    if len(capped) < len(seeds):
        part = sensitivity_table(mine[(mine.is_baseline == 1) | ~is_capped], settings["epochs"],
                                 confidence, tolerance=settings["tolerance"],
                                 family_size=family)
        for column in ("p_holm", "holm_low", "holm_high"):
            part[column] = float("nan")
        part["verdict"] = UNDETERMINED
        part["more_seeds"] = [cap - n for n in part.seeds]
        parts.append(part.assign(confirmed=False))
    if not parts:
        return pd.DataFrame()
    table = pd.concat(parts, ignore_index=True)
    return table.sort_values("start").reset_index(drop=True)


def _locate(table: pd.DataFrame, seeds: dict[int, int], settings) -> dict[int, int]:
    """Midpoints between neighbours whose mean damage lies on different sides of the tolerance."""
    above = {int(s): bool(d > settings["tolerance"]) for s, d in zip(table.start, table.damage,
                                                                       strict=True)}
    wanted: dict[int, int] = {}
    ordered = sorted(seeds)
    for a, b in zip(ordered, ordered[1:], strict=False):
        if a in above and b in above and above[a] != above[b]:
            middle = _middle(a, b, settings["resolution"])
            if middle is not None and middle not in seeds:
                wanted[middle] = settings["seeds_initial"]
    return wanted


def _middle(a: int, b: int, resolution: int) -> int | None:
    middle = a + ((b - a) // 2 // resolution) * resolution
    return middle if a < middle < b else None


def _confirm(table: pd.DataFrame, seeds: dict[int, int], settings) -> dict[int, int]:
    """Starts to raise to the seed cap (and midpoints to add at the cap); empty when settled."""
    cap = settings["seeds_max"]
    ordered = sorted(seeds)
    row = {int(s): r for s, r in zip(table.start, table.itertuples(), strict=True)}
    above = [s for s in ordered if s in row and row[s].damage > settings["tolerance"]]
    # Everything from the last start above the tolerance onward decides the boundary.
    begin = above[-1] if above else ordered[0]
    wanted = {s: cap for s in ordered if s >= begin and seeds[s] < cap}
    if wanted:
        return wanted
    confirmed = [s for s in ordered if seeds[s] >= cap]
    critical = [s for s in confirmed if row[s].verdict == CRITICAL]
    if not critical:
        earlier = [s for s in ordered if s < confirmed[0]] if confirmed else []
        if earlier:
            return {earlier[-1]: cap}
    # Midpoints between confirmed neighbours (from the latest critical start on) that disagree.
    latest = critical[-1] if critical else ordered[0]
    region = [s for s in confirmed if s >= latest]
    for a, b in zip(region, region[1:], strict=False):
        if row[a].verdict != row[b].verdict:
            middle = _middle(a, b, settings["resolution"])
            if middle is not None and middle not in seeds:
                wanted[middle] = cap
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
    history: list[str] = []
    table = pd.DataFrame()
    rounds, phase = 0, "locate"
    while rounds < settings["max_rounds"]:
        rounds += 1
        _run_round(plain, seeds, settings["length"], quiet)
        table = _table(folder, settings, seeds, confidence)
        todo = _locate(table, seeds, settings) if phase == "locate" else {}
        if not todo:
            phase = "confirm"
            todo = _confirm(table, seeds, settings)
        counts = ", ".join(f"{s}:{seeds[s]}" for s in sorted(seeds))
        history.append(f"round {rounds}: starts:seeds {counts}; next ({phase}) "
                       f"{todo or 'none'}")
        if not quiet:
            print(history[-1], flush=True)
        if not todo:
            break
        seeds.update(todo)
    else:
        history.append(f"stopped after design.max_rounds={settings['max_rounds']} rounds; "
                       "the boundary may not be settled")
        if not quiet:
            print(history[-1], flush=True)
    critical_until, safe_from = boundaries(table)
    _write(folder, table, plain)
    epochs = settings["epochs"]
    branch = sum((epochs - s) * n for s, n in seeds.items() if s in set(table.start))
    return AdaptiveOutcome(settings["length"], settings["tolerance"], critical_until, safe_from,
                           table, {int(s): int(n) for s, n in seeds.items()}, rounds, branch,
                           history)


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
