"""The sensitivity table: damage per window, paired by seed against the clean baseline.

Damage is measured in accuracy points (percentage points): baseline accuracy minus the window
run's accuracy, both evaluated on the same held-out examples at the same end epoch, for the same
seed. Diverged runs count with the accuracy they ended at (a real outcome); failed or unfinished
runs, and window runs whose baseline is missing, are counted in their own columns and never
silently averaged in. Runs that finished at chance accuracy (see :mod:`periodscan.analysis.
chance`) count with their accuracy too, and are counted with the diverged ones.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from periodscan.analysis.chance import at_chance
from periodscan.analysis.mcnemar import summarize_mcnemar
from periodscan.analysis.stats import BOOTSTRAP_MIN_SEEDS, Interval, damage_interval
from periodscan.analysis.verdicts import add_verdicts

POINTS = 100.0  # accuracy fraction -> percentage points
FINAL = ("done", "diverged")
#: The table's columns before verdicts and McNemar's summary, in the order sensitivity.csv has.
COLUMNS = ["start", "length", "end", "start_frac", "recovery_epochs", "seeds", "planned",
           "baseline_acc", "baseline_sd", "run_acc", "damage", "damage_sd", "damage_low",
           "damage_high", "confidence", "interval", "diverged", "baseline_diverged", "failed",
           "unfinished", "no_baseline", "short_recovery"]


@dataclass(frozen=True, kw_only=True)
class TableOptions:
    """How the table is computed.

    ``confidence`` sets the intervals and the verdict level; ``tolerance`` (accuracy points)
    adds verdicts, Holm-corrected over each ``family`` ("length": the windows of one length;
    "all": every window), padded to ``family_size`` hypotheses when a design measured only
    some candidate starts. ``num_classes`` turns on the at-chance check (None: off).
    ``min_recovery`` is the fewest clean epochs after a window that do not count as short
    (default: a tenth of the schedule, rounded up; our rule of thumb); ``bootstrap_min`` the
    seed count from which intervals are BCa bootstrap instead of Student t.
    """

    confidence: float = 0.95
    tolerance: float | None = None
    family: str = "length"
    family_size: int | None = None
    num_classes: int | None = None
    min_recovery: int | None = None
    bootstrap_min: int = BOOTSTRAP_MIN_SEEDS


def paired_damage(runs: pd.DataFrame) -> pd.DataFrame:
    """One row per finished (window run, seed) with its baseline and damage in points."""
    done = runs[runs.status.isin(FINAL)]
    base = done[done.is_baseline == 1][["seed", "end_epoch", "test_acc", "status"]].rename(
        columns={"test_acc": "baseline_acc", "status": "baseline_status"})
    windows = done[done.is_baseline == 0]
    paired = windows.merge(base, on=["seed", "end_epoch"], how="inner")
    paired["damage"] = (paired.baseline_acc - paired.test_acc) * POINTS
    return paired


def resolution(runs: pd.DataFrame) -> float:
    """Accuracy points one test example is worth (100 / n_test); 0 when unknown."""
    if "n_test" not in runs:
        return 0.0
    n_test = pd.to_numeric(runs.n_test, errors="coerce")
    n_test = n_test[n_test > 0]
    if n_test.empty:
        return 0.0
    return POINTS / float(n_test.median())


def sensitivity_table(runs: pd.DataFrame, schedule_epochs: int,
                      options: TableOptions | None = None,
                      mcnemar: pd.DataFrame | None = None) -> pd.DataFrame:
    """Aggregate per (start, length): seeds, baseline, mean damage and its interval.

    ``short_recovery`` flags windows followed by fewer than ``options.min_recovery`` clean
    epochs: their damage mixes lasting harm with a model that simply has not had time to
    readjust. The interval is Student-t below ``options.bootstrap_min`` seeds and BCa bootstrap
    from there on (column ``interval`` names it, ``seeds`` says how many seeds it rests on).
    With a tolerance the windows are labelled critical / safe / undetermined (see
    :mod:`periodscan.analysis.verdicts`). ``mcnemar`` is the output of
    :func:`periodscan.analysis.mcnemar.mcnemar_frame`; its per-window summary is joined in.
    """
    options = options or TableOptions()
    runs = runs.assign(at_chance=at_chance(runs, options.num_classes, options.confidence))
    paired = paired_damage(runs)
    floor = resolution(runs)
    bases = runs[runs.is_baseline == 1]
    rows, damages = [], {}
    for (start, length), group in runs[runs.is_baseline == 0].groupby(["start_epoch", "length"]):
        mine = paired[(paired.start_epoch == start) & (paired.length == length)]
        values = mine.damage.to_numpy()
        damages[(int(start), int(length))] = values
        interval = damage_interval(values, options.confidence, options.bootstrap_min,
                                   sd_floor=floor)
        rows.append(window_row(group, mine, bases, interval, schedule_epochs, options))
    table = pd.DataFrame(rows)
    if len(table):
        table = table[COLUMNS].sort_values(["length", "start"]).reset_index(drop=True)
    if options.tolerance is not None:
        table = add_verdicts(table, damages, options.tolerance, options.confidence,
                             options.family, sd_floor=floor, family_size=options.family_size)
    if mcnemar is not None and len(table):
        table = join_mcnemar(table, mcnemar, options.confidence)
    return table


def window_row(group: pd.DataFrame, mine: pd.DataFrame, bases: pd.DataFrame,
               interval: Interval, schedule_epochs: int, options: TableOptions) -> dict:
    """One window's row: where it sits, its estimates and what happened to its runs.

    ``group`` holds every run of the window, ``mine`` its runs paired with a baseline (from
    :func:`paired_damage`), ``bases`` every baseline run.
    """
    start, length = int(group.start_epoch.iloc[0]), int(group.length.iloc[0])
    end = int(group.end_epoch.iloc[0])
    min_recovery = options.min_recovery
    if min_recovery is None:
        min_recovery = math.ceil(schedule_epochs / 10)
    their_bases = bases[bases.seed.isin(group.seed) & (bases.end_epoch == end)]
    return {
        "start": start, "length": length, "end": end, "start_frac": start / schedule_epochs,
        "recovery_epochs": end - start - length,
        "short_recovery": end - start - length < min_recovery,
        **_estimates(mine, interval, options.confidence),
        **_outcomes(group, mine, their_bases),
    }


def _estimates(mine: pd.DataFrame, interval: Interval, confidence: float) -> dict:
    values = mine.damage.to_numpy()
    return {
        "seeds": interval.n,
        "baseline_acc": mine.baseline_acc.mean() * POINTS if len(mine) else np.nan,
        "baseline_sd": mine.baseline_acc.std(ddof=1) * POINTS if len(mine) > 1 else np.nan,
        "run_acc": mine.test_acc.mean() * POINTS if len(mine) else np.nan,
        "damage": interval.mean,
        "damage_sd": float(np.std(values, ddof=1)) if len(values) > 1 else np.nan,
        "damage_low": interval.low,
        "damage_high": interval.high,
        "confidence": confidence,
        "interval": interval.method,
    }


def _outcomes(group: pd.DataFrame, mine: pd.DataFrame, their_bases: pd.DataFrame) -> dict:
    """Counts of runs: planned, diverged or at chance (counted), failed, unfinished, unpaired."""
    finished = group[group.status.isin(FINAL)]
    return {
        "planned": len(group),
        "diverged": int(((group.status == "diverged") | group.at_chance).sum()),
        "baseline_diverged": int(((their_bases.status == "diverged")
                                  | their_bases.at_chance).sum()),
        "failed": int((group.status == "failed").sum()),
        "unfinished": int((~group.status.isin([*FINAL, "failed"])).sum()),
        "no_baseline": len(finished) - len(mine),
    }


def join_mcnemar(table: pd.DataFrame, mcnemar: pd.DataFrame, confidence: float) -> pd.DataFrame:
    """The table with McNemar's per-window summary (seeds tested, seeds that differ) joined in."""
    summary = summarize_mcnemar(mcnemar, 1.0 - confidence)
    table = table.merge(summary, on=["start", "length"], how="left")
    table["mcnemar_tested"] = table.mcnemar_tested.fillna(0).astype(int)
    table["mcnemar_differ"] = table.mcnemar_differ.fillna(0).astype(int)
    return table
