"""Still recovering or lasting: the trend of the paired gap over the clean epochs after a window.

A window's damage is read at one epoch, the run's last. If the gap to the baseline is still
closing there, part of that damage is a model that has not finished recovering, not lasting harm.
This module measures the trend, per window, from the per-epoch test accuracies the ledger keeps:

1. **Gap per seed and epoch**: baseline test accuracy minus the window run's, same seed, same
   epoch, in points (the baseline is the one the damage is paired with: same seed, same end).
2. **Slope per seed**: the ordinary least-squares slope of the gap on the epoch over the last
   ``K`` clean epochs before the end, ``K = min(clean epochs, fit_span(N))`` with
   ``fit_span(N) = max(4, ceil(N / 10))`` for an N-epoch schedule (:func:`fit_span`). Our rule
   of thumb: a tenth of the schedule is the stretch the table already calls short recovery, so
   a trend "at the end" is read over that stretch; at least 4 epochs so that one noisy epoch
   has limited leverage and each seed's line keeps two residual degrees of freedom.
3. **Over seeds**: one slope per seed, then a Student-t interval and test of their mean. Seeds
   are the independent units; epochs of one run are not (they share its weights), so a pooled
   regression over all epochs would treat correlated points as independent and claim too much.
   One summary number per unit, then ordinary statistics over units, is the summary-measures
   analysis of serial measurements (Matthews, Altman, Campbell & Royston, BMJ 1990; cited from
   memory).
4. **Still recovering**: the gap falls faster than a rate that matters, ``rate = tolerance /
   fit_span(N)`` points per epoch (at that rate another tolerance's worth of damage would go
   within one fit span), shown by a two-sided one-sample t test of "mean slope = -rate",
   Holm-corrected over the same family as the verdicts and decided in the direction of the mean,
   as verdicts are. A slow drift (the demo's late starts lose a few hundredths of a point per
   epoch) is not flagged; without a tolerance the rate is 0 and any significant fall counts.
5. **Would more recovery settle it**: the remaining gap above the tolerance divided by the mean
   rate (``epochs_to_tolerance``) and by the slowest rate the Holm-level interval allows
   (``epochs_to_tolerance_slow``). This is a straight-line extrapolation; recovery usually slows
   as it nears its floor, so both are lower bounds. ``settle`` says what follows for a window
   still recovering: :data:`WITHIN` (its mean gap is already within the tolerance and still
   falling: more recovery only lowers it), :data:`STAYS_ABOVE` (even at the mean rate the gap
   needs more than another schedule's length of clean epochs to reach the tolerance; since the
   straight line is optimistic, more recovery would likely not bring it within the tolerance)
   or :data:`MAY_REACH` (at the rates measured it could; only a longer recovery can tell).
   ``suggested_recovery_epochs`` is the ``design.recovery_epochs`` of a ``fixed_recovery``
   rerun that would show it: today's clean epochs plus the slow estimate, at least one more
   fit span (so the trend at the new end is read on epochs not seen yet) and at most another
   schedule's length.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from periodscan.analysis.sensitivity import FINAL, POINTS
from periodscan.analysis.stats import holm, holm_levels, t_interval, t_test_vs

#: Columns of :func:`recovery_frame` besides the window keys (variant, start, length).
RECOVERY_COLUMNS = ["clean_epochs", "fit_epochs", "slope_seeds", "slope", "slope_low",
                    "slope_high", "recovery_rate", "recovery_p", "recovery_p_holm",
                    "slope_holm_high", "still_recovering", "gap_end", "epochs_to_tolerance",
                    "epochs_to_tolerance_slow", "suggested_recovery_epochs", "settle"]
KEYS = ["variant", "start", "length"]
#: Fewest epochs a per-seed slope is fitted over (see the module docstring).
MIN_FIT = 4
#: What more recovery epochs would likely do for a window still recovering (``settle``).
WITHIN, MAY_REACH = "within_tolerance", "may_reach_tolerance"
STAYS_ABOVE = "stays_above_tolerance"


def fit_span(schedule_epochs: int) -> int:
    """Epochs a trend at the end is read over: max(4, a tenth of the schedule rounded up)."""
    return max(MIN_FIT, math.ceil(schedule_epochs / 10))


def gap_curves(runs: pd.DataFrame, epochs: pd.DataFrame) -> pd.DataFrame:
    """Per finished window run and clean epoch after its window: the paired gap in points.

    ``runs`` is a ledger's runs frame, ``epochs`` its per-epoch frame along each run's path
    (``SweepView.runs`` / ``SweepView.epochs``). Columns: variant, start, length, seed, end,
    epoch, gap. Epochs whose accuracy is not finite (a diverged run) are left out.
    """
    done = runs[runs.status.isin(FINAL)]
    info = done[["run_id", "seed", "start_epoch", "length", "end_epoch", "is_baseline"]].assign(
        variant=done["variant"] if "variant" in done else "")
    curve = epochs[["run_id", "epoch", "test_acc"]].merge(info, on="run_id")
    base = curve[curve.is_baseline == 1][["seed", "end_epoch", "epoch", "test_acc"]]
    base = base.drop_duplicates(["seed", "end_epoch", "epoch"]).rename(
        columns={"test_acc": "baseline_acc"})
    after = curve[(curve.is_baseline == 0)
                  & (curve.epoch >= curve.start_epoch + curve.length)
                  & (curve.epoch < curve.end_epoch)]
    paired = after.merge(base, on=["seed", "end_epoch", "epoch"])
    paired = paired.assign(gap=(paired.baseline_acc - paired.test_acc) * POINTS)
    paired = paired[np.isfinite(paired.gap)]
    out = paired.rename(columns={"start_epoch": "start", "end_epoch": "end"})
    out = out[["variant", "start", "length", "seed", "end", "epoch", "gap"]]
    return out.sort_values([*KEYS, "seed", "epoch"]).reset_index(drop=True)


def ols_slope(x, y) -> tuple[float, float]:
    """Least-squares slope of ``y`` on ``x`` and its standard error (NaN below 3 points).

    The textbook formulas ``b = Sxy / Sxx`` and ``se = sqrt(SSR / (n - 2) / Sxx)``, as
    ``scipy.stats.linregress`` reports them (``slope``, ``stderr``).
    """
    x, y = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    if len(x) < 2:
        return math.nan, math.nan
    xc = x - x.mean()
    sxx = float(xc @ xc)
    if sxx == 0:
        return math.nan, math.nan
    slope = float(xc @ (y - y.mean())) / sxx
    if len(x) < 3:
        return slope, math.nan
    resid = y - y.mean() - slope * xc
    return slope, math.sqrt(float(resid @ resid) / (len(x) - 2) / sxx)


def seed_slopes(curves: pd.DataFrame, span: int) -> pd.DataFrame:
    """One row per (window, seed): the gap's slope over its last ``min(clean, span)`` epochs.

    Columns: the window keys, seed, clean_epochs, fit_epochs, slope, stderr (points per
    epoch), gap_end (the gap at the run's last epoch). A seed missing any epoch of the
    stretch (a run that diverged) gets no slope.
    """
    rows = []
    for (variant, start, length, seed), one in curves.groupby([*KEYS, "seed"], sort=True):
        end = int(one.end.iloc[0])
        clean = end - int(start) - int(length)
        fit = min(clean, span)
        tail = one[one.epoch >= end - fit]
        slope, stderr = (ols_slope(tail.epoch, tail.gap) if len(tail) == fit
                         else (math.nan, math.nan))
        rows.append({"variant": variant, "start": int(start), "length": int(length),
                     "seed": int(seed), "clean_epochs": clean, "fit_epochs": fit,
                     "slope": slope, "stderr": stderr,
                     "gap_end": float(one.gap.iloc[-1]) if one.epoch.iloc[-1] == end - 1
                     else math.nan})
    return pd.DataFrame(rows, columns=[*KEYS, "seed", "clean_epochs", "fit_epochs", "slope",
                                       "stderr", "gap_end"])


def recovery_frame(runs: pd.DataFrame, epochs: pd.DataFrame, schedule_epochs: int, *,
                   tolerance: float | None = None, confidence: float = 0.95,
                   family: str = "length", family_size: int | None = None) -> pd.DataFrame:
    """Per window: the gap's trend at the end over seeds, and whether it is still recovering.

    ``family`` and ``family_size`` are the verdicts' Holm family ("length": the windows of one
    length, per variant; "all": every window of a variant) and its padding. Columns:
    :data:`KEYS` and :data:`RECOVERY_COLUMNS` (see the module docstring).
    """
    span = fit_span(schedule_epochs)
    rate = (tolerance or 0.0) / span
    slopes = seed_slopes(gap_curves(runs, epochs), span)
    rows = [_window_trend(keys, group, rate, confidence)
            for keys, group in slopes.groupby(KEYS, sort=True)]
    frame = pd.DataFrame(rows, columns=[*KEYS, *RECOVERY_COLUMNS])
    by = ["variant", "length"] if family == "length" else ["variant"]
    for _, group in frame.groupby(by, sort=False):
        _decide_family(frame, list(group.index), slopes, rate, 1.0 - confidence, family_size)
    return _extrapolate(frame, tolerance, schedule_epochs)


def _window_trend(keys: tuple, group: pd.DataFrame, rate: float, confidence: float) -> dict:
    values = group.slope.to_numpy(dtype=float)
    interval = t_interval(values, confidence)
    return {**dict(zip(KEYS, keys, strict=True)),
            "clean_epochs": int(group.clean_epochs.iloc[0]),
            "fit_epochs": int(group.fit_epochs.iloc[0]), "slope_seeds": interval.n,
            "slope": interval.mean, "slope_low": interval.low, "slope_high": interval.high,
            "recovery_rate": rate, "recovery_p": t_test_vs(values, -rate).pvalue,
            "recovery_p_holm": math.nan, "slope_holm_high": math.nan,
            "still_recovering": False, "gap_end": float(np.nanmean(group.gap_end))
            if group.gap_end.notna().any() else math.nan,
            "epochs_to_tolerance": math.nan, "epochs_to_tolerance_slow": math.nan,
            "suggested_recovery_epochs": math.nan, "settle": None}


def _decide_family(frame: pd.DataFrame, rows: list, slopes: pd.DataFrame, rate: float,
                   alpha: float, family_size: int | None) -> None:
    """Holm over one family's windows; flag those whose mean slope is below ``-rate``."""
    pvalues = frame.loc[rows, "recovery_p"].to_numpy(dtype=float)
    padded = np.concatenate([pvalues, np.ones(max(0, (family_size or 0) - len(pvalues)))])
    adjusted = holm(padded)[:len(rows)]
    levels = holm_levels(padded, alpha)[:len(rows)]
    for i, p_adj, level in zip(rows, adjusted, levels, strict=True):
        frame.at[i, "recovery_p_holm"] = p_adj
        if not np.isfinite(level):
            continue
        mine = slopes[(slopes.variant == frame.at[i, "variant"])
                      & (slopes.start == frame.at[i, "start"])
                      & (slopes.length == frame.at[i, "length"])]
        frame.at[i, "slope_holm_high"] = t_interval(mine.slope, 1.0 - level).high
        frame.at[i, "still_recovering"] = bool(p_adj <= alpha
                                               and frame.at[i, "slope"] < -rate)


def _extrapolate(frame: pd.DataFrame, tolerance: float | None,
                 schedule_epochs: int) -> pd.DataFrame:
    """Clean epochs more until the gap would reach the tolerance, for windows still recovering,
    at the mean rate and at the slowest rate of the Holm-level interval (straight lines), and
    what a ``fixed_recovery`` rerun would need (see the module docstring)."""
    frame["still_recovering"] = frame.still_recovering.astype(bool)
    frame["settle"] = frame.settle.astype(object)
    going = frame.still_recovering
    if tolerance is None or not going.any():
        return frame
    above = (frame.gap_end - tolerance).clip(lower=0.0)
    fast = above / -frame.slope
    slow = above / -frame.slope_holm_high
    frame.loc[going, "epochs_to_tolerance"] = fast[going]
    frame.loc[going, "epochs_to_tolerance_slow"] = slow[going]
    extra = np.clip(np.ceil(slow[going].to_numpy(dtype=float)), fit_span(schedule_epochs),
                    max(schedule_epochs, fit_span(schedule_epochs)))
    frame.loc[going, "suggested_recovery_epochs"] = frame.clean_epochs[going] + extra
    frame.loc[going, "settle"] = np.where(above[going] <= 0, WITHIN,
                                          np.where(fast[going] > schedule_epochs, STAYS_ABOVE,
                                                   MAY_REACH))
    return frame


def join_recovery(table: pd.DataFrame, recovery: pd.DataFrame) -> pd.DataFrame:
    """``table`` with :data:`RECOVERY_COLUMNS` joined in per window (on variant too, when the
    table has it). Rows without a trend keep NaN and ``still_recovering`` False."""
    if table.empty:
        return table
    keys = KEYS if "variant" in table else ["start", "length"]
    part = recovery if "variant" in table else recovery.drop(columns="variant")
    if "variant" not in table and part.duplicated(keys).any():
        raise ValueError("a table without a variant column cannot take the trends of several "
                         "variants")
    joined = table.merge(part, on=keys, how="left")
    joined["still_recovering"] = joined.still_recovering.fillna(False).astype(bool)
    return joined


@dataclass
class Trend:
    """One window's gap trend at the end, as answers carry it (columns of the same names in
    :func:`recovery_frame`; ``seeds`` is ``slope_seeds``)."""

    clean_epochs: int
    fit_epochs: int
    seeds: int
    slope: float
    slope_low: float
    slope_high: float
    still_recovering: bool
    epochs_to_tolerance: float = math.nan
    epochs_to_tolerance_slow: float = math.nan
    suggested_recovery_epochs: float = math.nan
    settle: str | None = None


def trend_of(row) -> Trend | None:
    """The trend :func:`join_recovery` put in a table row (a namedtuple), or None without one."""
    seeds = getattr(row, "slope_seeds", math.nan)
    if seeds is None or not np.isfinite(seeds) or seeds < 1:
        return None
    settle = getattr(row, "settle", None)
    return Trend(clean_epochs=int(row.clean_epochs), fit_epochs=int(row.fit_epochs),
                 seeds=int(seeds), slope=float(row.slope), slope_low=float(row.slope_low),
                 slope_high=float(row.slope_high), still_recovering=bool(row.still_recovering),
                 epochs_to_tolerance=float(row.epochs_to_tolerance),
                 epochs_to_tolerance_slow=float(row.epochs_to_tolerance_slow),
                 suggested_recovery_epochs=float(row.suggested_recovery_epochs),
                 settle=settle if isinstance(settle, str) else None)
