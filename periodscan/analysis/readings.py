"""Monitor readings (the ledger's extras) summarised as curves over epochs."""

from __future__ import annotations

import pandas as pd

FISHER_TOTAL = "fisher/total"


def fisher_by_epoch(extras: pd.DataFrame | None) -> pd.DataFrame:
    """Mean and sd across seeds of ``fisher/total`` per epoch on the clean baselines' paths.

    Returns columns ``epoch`` (epochs completed: a reading taken after the e-th epoch, 0-based,
    sits at e + 1), ``mean``, ``sd``, ``seeds``; empty when the sweep has no Fisher readings.
    """
    columns = ["epoch", "mean", "sd", "seeds"]
    if extras is None or extras.empty or "name" not in extras:
        return pd.DataFrame(columns=columns)
    fisher = extras[(extras.name == FISHER_TOTAL) & (extras.length == 0)]
    if fisher.empty:
        return pd.DataFrame(columns=columns)
    per_seed = fisher.groupby(["seed", "epoch"]).value.mean().reset_index()
    out = per_seed.groupby("epoch").value.agg(["mean", "std", "count"]).reset_index()
    out.columns = columns
    out["epoch"] = out.epoch + 1
    return out
