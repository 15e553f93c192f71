"""The adaptive design: find the edges of the critical window with as few runs as possible.

For one deficit length and the sweep's tolerance it searches the grid of candidate starts
(``first_start .. last_start`` every ``resolution`` epochs) for its two edges: the latest
critical start and the earliest start from which every later start is safe. Each round is an
ordinary sweep of the same training config in the same folder (runs, trunks and checkpoints of
earlier rounds are reused, and each run is the very run a full grid would train: exact
branching).

* Verdicts are only taken at the seed cap (``seeds_max``): stopping a start as soon as its
  interval clears the tolerance (optional stopping) inflates the error rate of a fixed-level
  test, so every verdict rests on the same fixed number of seeds. Holm's correction counts the
  whole candidate grid, the starts not measured at the cap entering with p = 1: the adaptive
  design is never bolder than the full grid would be with the same seeds.
* New starts are first measured with ``seeds_initial`` seeds. That interim mean only steers the
  search (a *screen*): a start whose interim mean damage is at most the tolerance is taken as
  not critical, one whose mean is at least the tolerance as not safe, without more seeds. Every
  other start the search stands on is raised to the cap.
* Critical edge: the latest start that is critical at the cap or, uncapped, has an interim mean
  above the tolerance is raised to the cap; once it is critical, the midpoint between it and
  the next measured start is measured, until the two are ``resolution`` apart and both capped.
* Safe edge: the last candidate start is raised to the cap; if it is not safe there is no safe
  stretch. Otherwise every measured start after the latest start that is not safe (at the cap or
  by the screen) is raised to the cap, and the gap before the earliest of them is bisected the
  same way.

So seeds are added only where the boundary is decided, and starts the screen settles keep
``seeds_initial`` seeds and are reported undetermined ("not confirmed").

The screen can mislead where the interim mean falls on the wrong side of the tolerance: a start
that would be critical at the cap but had an unlucky first few seeds. The closer a start's
damage is to the tolerance, the likelier that is; ``benchmarks/adaptive_vs_grid.py`` counts
how often it happens on real grids. The search also assumes the damage changes monotonically
between the starts it measured: a critical stretch narrower than ``initial_step`` between two
harmless coarse starts is missed. Choose ``initial_step`` below the narrowest stretch you care
about.
"""

from __future__ import annotations

import json
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

SEEDS_META = "adaptive_seeds"  # ledger meta key: seeds used per start


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


def adaptive_settings(plain: dict[str, Any]) -> dict[str, Any]:
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
    max_rounds = _int(design.get("max_rounds", 16), "design.max_rounds", 1)
    tolerance = plain.get("tolerance")
    if not isinstance(tolerance, (int, float)) or isinstance(tolerance, bool):
        raise bad_value("tolerance", "a number (accuracy points) for the adaptive design",
                        tolerance)
    return dict(length=length, resolution=resolution, step=step, first=first, last=last,
                seeds_initial=seeds_initial, seeds_max=seeds_max,
                max_rounds=max_rounds, tolerance=float(tolerance), epochs=epochs)


def _grid(first: int, last: int, resolution: int) -> list[int]:
    return list(range(first, last + 1, resolution))


def candidate_starts(plain: dict[str, Any]) -> list[int]:
    """Every start the adaptive design could measure: the grid Holm's correction counts."""
    settings = adaptive_settings(plain)
    return _grid(settings["first"], settings["last"], settings["resolution"])


def _coarse(first: int, last: int, step: int) -> list[int]:
    starts = list(range(first, last + 1, step))
    return starts if starts[-1] == last else [*starts, last]


def coarse_config(config: DictConfig) -> DictConfig:
    """The first round as an ordinary window sweep (what ``--dry-run`` describes)."""
    plain = to_plain(config)
    settings = adaptive_settings(plain)
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


def runs_used(runs: pd.DataFrame, settings: dict[str, Any],
              seeds: dict[int, int]) -> pd.DataFrame:
    """The runs the design used: baselines up to the seed cap, each start at its seed count."""
    length, cap = settings["length"], settings["seeds_max"]
    used = [(r.is_baseline == 1 and r.seed < cap) or
            (r.length == length and int(r.start_epoch) in seeds
             and r.seed < seeds[int(r.start_epoch)])
            for r in runs.itertuples()]
    return runs[pd.Series(used, index=runs.index, dtype=bool)
                & (runs.end_epoch == settings["epochs"])]


def adaptive_table(runs: pd.DataFrame, settings: dict[str, Any], seeds: dict[int, int],
                   confidence: float, tolerance: float | None = None) -> pd.DataFrame:
    """Sensitivity table of the measured starts: verdicts only for starts at the seed cap.

    ``runs`` is a ledger's runs frame (it may hold more runs than the design used: a grid in the
    same folder); ``seeds`` says how many seeds each start used. Capped starts are labelled with
    Holm's correction padded to the full candidate grid; the others are listed with their damage
    estimate, verdict undetermined and ``confirmed`` False. ``tolerance`` defaults to the one
    the design searched for.
    """
    tolerance = settings["tolerance"] if tolerance is None else float(tolerance)
    cap = settings["seeds_max"]
    mine = runs_used(runs, settings, seeds)
    capped = {s for s, n in seeds.items() if n >= cap}
    is_capped = mine.start_epoch.isin(list(capped))
    family = len(_grid(settings["first"], settings["last"], settings["resolution"]))  # padded
    parts = []
    if capped:
        part = sensitivity_table(mine[(mine.is_baseline == 1) | is_capped], settings["epochs"],
                                 confidence, tolerance=tolerance, family_size=family)
        parts.append(part.assign(confirmed=True))
    if len(capped) < len(seeds):
        part = sensitivity_table(mine[(mine.is_baseline == 1) | ~is_capped], settings["epochs"],
                                 confidence, tolerance=tolerance, family_size=family)
        for column in ("p_holm", "holm_low", "holm_high"):
            part[column] = float("nan")
        part["verdict"] = UNDETERMINED
        part["more_seeds"] = [cap - n for n in part.seeds]
        parts.append(part.assign(confirmed=False))
    if not parts:
        return pd.DataFrame()
    table = pd.concat(parts, ignore_index=True)
    return table.sort_values("start").reset_index(drop=True)


def _table(folder, settings, seeds: dict[int, int], confidence: float) -> pd.DataFrame:
    ledger = Ledger(folder)
    try:
        runs = ledger.runs_frame()
    finally:
        ledger.close()
    return adaptive_table(runs, settings, seeds, confidence)


def _middle(a: int, b: int, resolution: int) -> int | None:
    middle = a + ((b - a) // 2 // resolution) * resolution
    return middle if a < middle < b else None


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
    middle = _middle(low, high, settings["resolution"])
    if middle is not None:
        return {middle: settings["seeds_initial"]}
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


def run_adaptive(config: DictConfig | dict | Sequence[str] = (),
                 quiet: bool = False) -> AdaptiveOutcome:
    """Run the adaptive design described by ``config`` (``design=adaptive``)."""
    plain = plain_config(config)
    if plain["design"].get("kind") != "adaptive":
        raise ConfigError("run_adaptive needs design.kind 'adaptive' (use design=adaptive)")
    settings = adaptive_settings(plain)
    confidence = float(plain.get("confidence", 0.95))
    folder = results_folder(plain)
    seeds = {s: settings["seeds_initial"]
             for s in _coarse(settings["first"], settings["last"], settings["step"])}
    history: list[str] = []
    rounds = 0
    while True:
        rounds += 1
        _run_round(plain, seeds, settings["length"], quiet)
        table = _table(folder, settings, seeds, confidence)
        todo = next_round(table, seeds, settings)
        counts = ", ".join(f"{s}:{seeds[s]}" for s in sorted(seeds))
        history.append(f"round {rounds}: starts:seeds {counts}; next {todo or 'none'}")
        if not quiet:
            print(history[-1], flush=True)
        if not todo:
            break
        if rounds >= settings["max_rounds"]:
            history.append(f"stopped after design.max_rounds={settings['max_rounds']} rounds; "
                           "the boundary may not be settled")
            if not quiet:
                print(history[-1], flush=True)
            break
        seeds.update(todo)
    critical_until, safe_from = boundaries(table)
    _write(folder, table, plain, seeds)
    epochs = settings["epochs"]
    branch = sum((epochs - s) * n for s, n in seeds.items() if s in set(table.start))
    return AdaptiveOutcome(settings["length"], settings["tolerance"], critical_until, safe_from,
                           table, {int(s): int(n) for s, n in seeds.items()}, rounds, branch,
                           history)


def _write(folder, table: pd.DataFrame, plain: dict[str, Any], seeds: dict[int, int]) -> None:
    """Leave the folder describing the adaptive design, not its last round.

    config.yaml gets the adaptive config back and the ledger the seeds used per start, so that
    ``plan``, ``report`` and ``load_sweep`` read the folder by the adaptive rule (verdicts at the
    cap only); the table and curve replace the last round's partial outputs.
    """
    from periodscan.engine.checkpoint import write_atomic
    from periodscan.engine.lock import FolderLock
    from periodscan.plots import sensitivity_curve
    from periodscan.sweep import CURVE_PNG, TABLE_CSV, describe

    with FolderLock(folder):
        ledger = Ledger(folder)
        try:
            ledger.set_meta(**{SEEDS_META: {str(s): int(n) for s, n in sorted(seeds.items())}})
        finally:
            ledger.close()
        write_atomic(folder / "config.yaml",
                     OmegaConf.to_yaml(OmegaConf.create(plain)).encode())
        write_atomic(folder / TABLE_CSV,
                     table.to_csv(index=False, float_format="%.6g").encode())
        if len(table):
            sensitivity_curve(table, folder / CURVE_PNG,
                              title=describe(plain) + " (adaptive)",
                              tolerance=plain.get("tolerance"))


def stored_seeds(meta_value: str | dict | None) -> dict[int, int] | None:
    """The seeds-per-start map an adaptive run left in its ledger (None when there is none)."""
    if meta_value is None:
        return None
    raw = json.loads(meta_value) if isinstance(meta_value, str) else meta_value
    return {int(s): int(n) for s, n in raw.items()}


def grid_branch_epochs(epochs: int, starts: Sequence[int], seeds: int) -> int:
    """Epochs a full grid of one length trains after each window start, over its seeds."""
    return sum(epochs - s for s in starts) * seeds
