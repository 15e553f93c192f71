"""Words for a window's gap trend (still recovering) and for the bound the data established.

The numbers come from :mod:`periodscan.analysis.recovery` and
:mod:`periodscan.analysis.established`; the text table, the plan and the HTML page all say them
with these phrases.
"""

from __future__ import annotations

import math

import pandas as pd

from periodscan.analysis import recovery
from periodscan.analysis.established import Established, has_open, table_bounds
from periodscan.analysis.recovery import Trend


def ceil2(value: float) -> float:
    """Rounded up to two decimals, so a rounded upper bound still holds."""
    return math.ceil(value * 100 - 1e-9) / 100


def trend_note(slope: float, fit_epochs: int) -> str:
    """'still recovering (-13.39 points/epoch over the last 4 epochs)'."""
    return f"still recovering ({slope:+.2f} points/epoch over the last {fit_epochs} epochs)"


def row_trend_note(row) -> str:
    """The note for a table row whose gap is still falling at the end, else ''."""
    if not bool(getattr(row, "still_recovering", False)):
        return ""
    return trend_note(float(row.slope), int(row.fit_epochs))


def established_text(bound: Established, unit: str = "window") -> str:
    """'a 15-epoch deficit does less than 1.84 points of damage at every start measured (95%
    confidence, Holm over 5 windows)'; ``unit`` names what Holm counted ("window", "start")."""
    where = "start" if bound.length is not None else "window"
    what = (f"a {bound.length}-epoch deficit does less than" if bound.length is not None
            else "damage is below")
    text = (f"{what} {ceil2(bound.bound):.2f} points of damage at every {where} measured "
            f"({bound.confidence:.0%} confidence, Holm over {bound.family} "
            f"{unit}{'' if bound.family == 1 else 's'})")
    if bound.length is None:
        text = text.replace(" of damage", "")
    if bound.left_out:
        text += (f"; start(s) {', '.join(map(str, bound.left_out))} (fewer than 2 seeds) not "
                 "covered")
    return text


def established_lines(table: pd.DataFrame, per_length: bool = True,
                      family_size: int | None = None) -> list[str]:
    """'established: ...' lines for a table's footer, one per Holm family, when some window is
    undetermined. A table screened by an adaptive design states nothing unless its Holm family
    size is given (its verdicts count unmeasured candidate starts too)."""
    if not has_open(table):
        return []
    if family_size is None and "confirmed" in table and not table.confirmed.astype(bool).all():
        return []
    if "stopped" in table:  # seeds added in stages: a fixed-sample bound would not hold
        return []
    return [f"established: {established_text(b)}"
            for b in table_bounds(table, per_length, family_size)]


def settle_text(trend: Trend) -> str:
    """Whether more clean epochs would likely settle a still-recovering window, and the rerun."""
    rerun = ("design.budget=fixed_recovery design.recovery_epochs="
             f"{int(trend.suggested_recovery_epochs)}")
    if trend.settle == recovery.WITHIN:
        return ("Its mean gap is already within the tolerance and still falling: more recovery "
                f"epochs would only lower it ({rerun} shows where it levels off).")
    if trend.settle == recovery.STAYS_ABOVE:
        return (f"Even at that rate the gap needs {trend.epochs_to_tolerance:.0f} more clean "
                "epochs to reach the tolerance, more than the whole schedule, and recovery "
                "slows: more recovery epochs would likely not bring it within the tolerance. "
                f"To measure the lasting part, rerun with {rerun}.")
    fast, slow = (math.ceil(trend.epochs_to_tolerance),
                  math.ceil(trend.epochs_to_tolerance_slow))
    return (f"At that rate the gap would reach the tolerance after {fast} more clean "
            f"epoch{'' if fast == 1 else 's'} ({slow} at the slowest rate its Holm interval "
            "allows); recovery slows as it nears its floor, so that is a lower bound. More "
            f"recovery epochs may settle it: rerun with {rerun}.")


def recovering_text(start: int, trend: Trend, confidence: float) -> str:
    """One still-recovering start in words: its trend, what it means, and the settle advice."""
    return (f"Start {start}: the gap to the baseline was still falling at the end "
            f"({trend.slope:+.2f} points/epoch over the last {trend.fit_epochs} clean epochs, "
            f"{confidence:.0%} interval {trend.slope_low:+.2f} to {trend.slope_high:+.2f}, "
            f"{trend.seeds} seeds): part of its damage is recovery not yet done, not lasting "
            f"harm. {settle_text(trend)}")


METHOD_TREND = (
    "Still recovering: per seed, the least-squares slope of the paired gap (baseline minus run "
    "accuracy, per epoch) over the last max(4, a tenth of the schedule) clean epochs before the "
    "end (fewer if fewer followed the window); then a t test over seeds of the mean slope "
    "against minus tolerance / that span (a fall that would shed another tolerance's worth "
    "within it), Holm-corrected over the verdicts' family. Flagged windows' damage still "
    "includes recovery not yet done. Extrapolations to the tolerance are straight lines and so "
    "lower bounds: recovery slows as it nears its floor.")
METHOD_ESTABLISHED = (
    "Established bound: the smallest X for which Holm's procedure over the verdicts' family "
    "rejects 'mean damage >= X' at every window (the verdicts' two-sided t test with X in place "
    "of the tolerance); it holds for all windows at once at the confidence level, and it is "
    "below the tolerance exactly when every window is safe.")
