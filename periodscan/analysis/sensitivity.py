"""The sensitivity table: damage per window, paired by seed against the clean baseline.

Damage is measured in accuracy points (percentage points): baseline accuracy minus the window
run's accuracy, both evaluated on the same held-out examples at the same end epoch, for the same
seed. Diverged runs count with the accuracy they ended at; failed or unfinished runs are counted
in their own columns and never silently averaged in.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from periodscan.analysis.stats import t_interval

POINTS = 100.0  # accuracy fraction -> percentage points


def paired_damage(runs: pd.DataFrame) -> pd.DataFrame:
    """One row per finished (window run, seed) with its baseline and damage in points."""
    done = runs[runs.status.isin(["done", "diverged"])]
    base = done[done.is_baseline == 1][["seed", "end_epoch", "test_acc"]].rename(
        columns={"test_acc": "baseline_acc"})
    windows = done[done.is_baseline == 0]
    paired = windows.merge(base, on=["seed", "end_epoch"], how="inner")
    paired["damage"] = (paired.baseline_acc - paired.test_acc) * POINTS
    return paired


def sensitivity_table(runs: pd.DataFrame, schedule_epochs: int, confidence: float = 0.95,
                      min_recovery: int | None = None) -> pd.DataFrame:
    """Aggregate per (start, length): seeds, baseline, mean damage and its t interval.

    ``short_recovery`` flags windows followed by fewer than ``min_recovery`` clean epochs
    (default: a tenth of the schedule, rounded up; our rule of thumb): their damage mixes lasting
    harm with a model that simply has not had time to readjust.
    """
    if min_recovery is None:
        min_recovery = math.ceil(schedule_epochs / 10)
    paired = paired_damage(runs)
    windows = runs[runs.is_baseline == 0]
    rows = []
    for (start, length), group in windows.groupby(["start_epoch", "length"]):
        mine = paired[(paired.start_epoch == start) & (paired.length == length)]
        interval = t_interval(mine.damage.to_numpy(), confidence)
        end = int(group.end_epoch.iloc[0])
        rows.append({
            "start": int(start),
            "length": int(length),
            "end": end,
            "recovery_epochs": end - int(start) - int(length),
            "seeds": interval.n,
            "baseline_acc": mine.baseline_acc.mean() * POINTS if len(mine) else np.nan,
            "baseline_sd": mine.baseline_acc.std(ddof=1) * POINTS if len(mine) > 1 else np.nan,
            "run_acc": mine.test_acc.mean() * POINTS if len(mine) else np.nan,
            "damage": interval.mean,
            "damage_low": interval.low,
            "damage_high": interval.high,
            "confidence": confidence,
            "interval": interval.method,
            "diverged": int((group.status == "diverged").sum()),
            "failed": int((group.status == "failed").sum()),
            "unfinished": int(group.status.isin(["pending"]).sum()),
            "short_recovery": end - int(start) - int(length) < min_recovery,
        })
    table = pd.DataFrame(rows)
    if len(table):
        table = table.sort_values(["length", "start"]).reset_index(drop=True)
    return table
