"""Onsets: what it costs to make a lasting change at epoch t rather than at epoch 0.

An onset run makes a change at epoch t and keeps it to the end of training (in run terms the
window ``[t, end)``). Beside its damage against never making the change (the sensitivity
table), an onset has a *delay cost*: the accuracy of the same seed's onset-0 run minus its
onset-t run, in accuracy points, paired by seed. A positive delay cost means switching late is
worse than switching at the start.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from periodscan.analysis.sensitivity import FINAL, POINTS
from periodscan.analysis.stats import BOOTSTRAP_MIN_SEEDS, damage_interval

#: Columns the onset design adds to the sensitivity table (NaN on the onset-0 row, the
#: reference): mean delay cost, its spread, interval and the seeds it rests on.
DELAY_COLUMNS = ["delay_cost", "delay_sd", "delay_low", "delay_high", "delay_seeds"]


def delay_costs(runs: pd.DataFrame) -> dict[int, np.ndarray]:
    """Per onset t > 0, the per-seed delay costs in points, seeds in ascending order.

    Only finished runs (done, or diverged with the accuracy they ended at) count, and only
    seeds whose onset-0 run finished too: every value is a within-seed difference.
    """
    done = runs[(runs.is_baseline == 0) & runs.status.isin(FINAL)]
    first = done[done.start_epoch == 0][["seed", "test_acc"]].rename(
        columns={"test_acc": "first_acc"})
    costs = {}
    for onset, group in done[done.start_epoch > 0].groupby("start_epoch"):
        paired = group.merge(first, on="seed").sort_values("seed")
        costs[int(onset)] = ((paired.first_acc - paired.test_acc) * POINTS).to_numpy()
    return costs


def add_delay_columns(table: pd.DataFrame, runs: pd.DataFrame, confidence: float,
                      sd_floor: float = 0.0,
                      bootstrap_min: int = BOOTSTRAP_MIN_SEEDS) -> pd.DataFrame:
    """The onset table, sorted by onset, with :data:`DELAY_COLUMNS` added.

    The interval is chosen like the damage interval: Student t below ``bootstrap_min`` seeds,
    BCa bootstrap from there on; ``sd_floor`` stands in for a spread of exactly zero.
    """
    table = table.sort_values("start").reset_index(drop=True)
    for column in DELAY_COLUMNS:
        table[column] = np.nan
    costs = delay_costs(runs)
    for i, onset in enumerate(table.start.astype(int)):
        values = costs.get(onset)
        if onset == 0 or values is None:
            table.at[i, "delay_seeds"] = 0
            continue
        interval = damage_interval(values, confidence, bootstrap_min, sd_floor=sd_floor)
        table.at[i, "delay_cost"] = interval.mean
        table.at[i, "delay_sd"] = float(np.std(values, ddof=1)) if len(values) > 1 else np.nan
        table.at[i, "delay_low"], table.at[i, "delay_high"] = interval.low, interval.high
        table.at[i, "delay_seeds"] = interval.n
    table["delay_seeds"] = table.delay_seeds.astype(int)
    return table
