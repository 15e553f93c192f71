"""The sensitivity table: damage per window, paired by seed against the clean baseline.

Damage is measured in accuracy points (percentage points): baseline accuracy minus the window
run's accuracy, both evaluated on the same held-out examples at the same end epoch, for the same
seed. Diverged runs count with the accuracy they ended at (a real outcome); failed or unfinished
runs, and window runs whose baseline is missing, are counted in their own columns and never
silently averaged in.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd

from periodscan.analysis.mcnemar import summarize_mcnemar
from periodscan.analysis.stats import BOOTSTRAP_MIN_SEEDS, damage_interval
from periodscan.analysis.verdicts import add_verdicts

POINTS = 100.0  # accuracy fraction -> percentage points


def paired_damage(runs: pd.DataFrame) -> pd.DataFrame:
    """One row per finished (window run, seed) with its baseline and damage in points."""
    done = runs[runs.status.isin(["done", "diverged"])]
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


def sensitivity_table(runs: pd.DataFrame, schedule_epochs: int, confidence: float = 0.95,
                      min_recovery: int | None = None, *, tolerance: float | None = None,
                      family: str = "length", bootstrap_min: int = BOOTSTRAP_MIN_SEEDS,
                      mcnemar: pd.DataFrame | None = None,
                      family_size: int | None = None) -> pd.DataFrame:
    """Aggregate per (start, length): seeds, baseline, mean damage and its interval.

    ``short_recovery`` flags windows followed by fewer than ``min_recovery`` clean epochs
    (default: a tenth of the schedule, rounded up; our rule of thumb): their damage mixes lasting
    harm with a model that simply has not had time to readjust.

    The interval is Student-t below ``bootstrap_min`` seeds and BCa bootstrap from there on
    (column ``interval`` names it, ``seeds`` says how many seeds it rests on). With a
    ``tolerance`` the windows are labelled critical / safe / undetermined with Holm's correction
    over each ``family`` (see :mod:`periodscan.analysis.verdicts`), padded to ``family_size``
    hypotheses when the design measured only some of the candidate starts. ``mcnemar`` is the
    output of :func:`periodscan.analysis.mcnemar.mcnemar_frame`; its per-window summary is
    joined in.
    """
    if min_recovery is None:
        min_recovery = math.ceil(schedule_epochs / 10)
    paired = paired_damage(runs)
    floor = resolution(runs)
    windows = runs[runs.is_baseline == 0]
    bases = runs[runs.is_baseline == 1]
    rows, damages = [], {}
    for (start, length), group in windows.groupby(["start_epoch", "length"]):
        mine = paired[(paired.start_epoch == start) & (paired.length == length)]
        values = mine.damage.to_numpy()
        damages[(int(start), int(length))] = values
        interval = damage_interval(values, confidence, bootstrap_min, sd_floor=floor)
        end = int(group.end_epoch.iloc[0])
        finished = group[group.status.isin(["done", "diverged"])]
        their_bases = bases[bases.seed.isin(group.seed) & (bases.end_epoch == end)]
        rows.append({
            "start": int(start),
            "length": int(length),
            "end": end,
            "start_frac": int(start) / schedule_epochs,
            "recovery_epochs": end - int(start) - int(length),
            "seeds": interval.n,
            "planned": len(group),
            "baseline_acc": mine.baseline_acc.mean() * POINTS if len(mine) else np.nan,
            "baseline_sd": mine.baseline_acc.std(ddof=1) * POINTS if len(mine) > 1 else np.nan,
            "run_acc": mine.test_acc.mean() * POINTS if len(mine) else np.nan,
            "damage": interval.mean,
            "damage_sd": float(np.std(values, ddof=1)) if len(values) > 1 else np.nan,
            "damage_low": interval.low,
            "damage_high": interval.high,
            "confidence": confidence,
            "interval": interval.method,
            "diverged": int((group.status == "diverged").sum()),
            "baseline_diverged": int((their_bases.status == "diverged").sum()),
            "failed": int((group.status == "failed").sum()),
            "unfinished": int((~group.status.isin(["done", "diverged", "failed"])).sum()),
            "no_baseline": len(finished) - len(mine),
            "short_recovery": end - int(start) - int(length) < min_recovery,
        })
    table = pd.DataFrame(rows)
    if len(table):
        table = table.sort_values(["length", "start"]).reset_index(drop=True)
    if tolerance is not None:
        table = add_verdicts(table, damages, tolerance, confidence, family, sd_floor=floor,
                             family_size=family_size)
    if mcnemar is not None and len(table):
        summary = summarize_mcnemar(mcnemar, 1.0 - confidence)
        table = table.merge(summary, on=["start", "length"], how="left")
        table["mcnemar_tested"] = table.mcnemar_tested.fillna(0).astype(int)
        table["mcnemar_differ"] = table.mcnemar_differ.fillna(0).astype(int)
    return table
