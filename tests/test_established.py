"""What the data established: an upper bound on damage at every window, Holm-corrected.

Checked against statsmodels' Holm (``multipletests(method="holm")``) run on scipy's one-sample
t tests, against the unadjusted and Bonferroni bounds it must lie between, against the verdicts
(the bound is below the tolerance exactly when every window is safe), and by simulation.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from periodscan.analysis.established import (
    below_pvalues,
    family_bound,
    holm_upper_bound,
    table_bounds,
    verdict_sd,
)
from periodscan.analysis.planner import plan_from_table
from periodscan.analysis.sensitivity import TableOptions, sensitivity_table
from periodscan.designs.layout import REMOVAL, WINDOW
from periodscan.views.plan import format_plan, plan_record
from periodscan.views.tables import format_table

ALPHA = 0.05


def holm_rejects_all(samples: list[np.ndarray], x: float, size: int | None = None) -> bool:
    """Reference: scipy's one-sided t test of "mean >= x" (doubled: the two-sided p-value in
    the direction of the mean), then statsmodels' Holm over the family (padded with 1s)."""
    p = [min(1.0, 2 * stats.ttest_1samp(v, x, alternative="less").pvalue) for v in samples]
    padded = p + [1.0] * max(0, (size or 0) - len(p))
    return bool(multipletests(padded, alpha=ALPHA, method="holm")[0][:len(p)].all())


def summaries(samples):
    return ([v.mean() for v in samples], [v.std(ddof=1) for v in samples],
            [len(v) for v in samples])


@pytest.mark.parametrize("size", [None, 9])
def test_bound_is_the_edge_of_holm_rejecting_every_window(size):
    rng = np.random.default_rng(11)
    samples = [rng.normal(mu, sd, n) for mu, sd, n in
               ((0.2, 0.5, 5), (1.1, 0.8, 6), (0.4, 0.3, 5), (-0.3, 1.2, 8))]
    bound = holm_upper_bound(*summaries(samples), 0.95, family_size=size)
    assert holm_rejects_all(samples, bound + 1e-7, size)
    assert not holm_rejects_all(samples, bound - 1e-6, size)
    # Between the largest unadjusted bound and the largest Bonferroni bound (alpha / m).
    m = size or len(samples)
    plain = max(stats.ttest_1samp(v, 0).confidence_interval(0.95).high for v in samples)
    bonferroni = max(stats.ttest_1samp(v, 0).confidence_interval(1 - ALPHA / m).high
                     for v in samples)
    assert plain <= bound + 1e-9 <= bonferroni + 2e-9


def test_below_pvalues_match_scipy():
    rng = np.random.default_rng(5)
    samples = [rng.normal(0.5, 1.0, 6) for _ in range(3)]
    got = below_pvalues(*summaries(samples), 1.3)
    ref = [min(1.0, 2 * stats.ttest_1samp(v, 1.3, alternative="less").pvalue) for v in samples]
    assert got == pytest.approx(ref, rel=1e-10)
    assert list(below_pvalues([1.0, 2.0], [0.0, 0.0], [3, 3], 1.5)) == [0.0, 1.0]


def test_bound_covers_the_largest_true_damage_at_the_confidence_level():
    # Simulation: 5 windows, 5 seeds each, true mean damages below; the bound must exceed the
    # largest (1.0) in at least 95% of repetitions (binomial margin for 1500 draws: ~1.7%).
    rng = np.random.default_rng(2026)
    truth = np.array([0.0, 0.5, 1.0, 1.0, 0.2])
    hits = 0
    for _ in range(1500):
        draws = rng.normal(truth[:, None], 1.0, (5, 5))
        bound = holm_upper_bound(draws.mean(1), draws.std(1, ddof=1), [5] * 5, 0.95)
        hits += bound > truth.max()
    assert hits / 1500 >= 0.95 - 0.017


def runs_frame(damage: dict[int, list[float]], base: float = 0.9,
               n_test: int = 1000) -> pd.DataFrame:
    """A ledger-shaped runs frame: one baseline per seed, windows of length 5 ending at 30,
    each seed's window accuracy = baseline - damage / 100."""
    seeds = len(next(iter(damage.values())))
    rows = [dict(run_id=f"b{s}", seed=s, start_epoch=0, length=0, end_epoch=30, is_baseline=1,
                 status="done", test_acc=base, n_test=n_test) for s in range(seeds)]
    rows += [dict(run_id=f"w{start}-{s}", seed=s, start_epoch=start, length=5, end_epoch=30,
                  is_baseline=0, status="done", test_acc=base - d / 100, n_test=n_test)
             for start, values in damage.items() for s, d in enumerate(values)]
    return pd.DataFrame(rows)


DAMAGE = {0: [0.4, 0.1, 0.6, 0.2, 0.3], 10: [-0.1, 0.2, 0.0, 0.3, 0.1],
          20: [0.5, -0.2, 0.9, 0.1, 0.4]}


@pytest.mark.parametrize("tolerance", [0.5, 0.8, 1.0, 1.5])
def test_bound_below_tolerance_exactly_when_every_window_is_safe(tolerance):
    table = sensitivity_table(runs_frame(DAMAGE), 30, TableOptions(tolerance=tolerance))
    bound = table_bounds(table)[0]
    all_safe = (table.verdict == "safe").all()
    assert (bound.bound < tolerance) == all_safe
    samples = [np.array(v) for v in DAMAGE.values()]
    assert holm_rejects_all(samples, bound.bound + 1e-7)
    assert bound.starts == (0, 10, 20) and bound.family == 3 and bound.length == 5


def test_a_window_without_spread_uses_the_verdicts_floor():
    damage = {**DAMAGE, 30: [0.3] * 5}  # every seed the same: the test uses one example's worth
    table = sensitivity_table(runs_frame(damage), 30, TableOptions(tolerance=0.5))
    row = next(table[table.start == 30].itertuples())
    assert verdict_sd(row) == pytest.approx(100 / 1000, rel=1e-6)
    one_seed = sensitivity_table(runs_frame({0: [0.2, 0.3], 10: [0.1, 0.4]}).query(
        "not (start_epoch == 10 and seed == 1)"), 30, TableOptions(tolerance=0.5))
    bound = family_bound(one_seed)
    assert bound.starts == (0,) and bound.left_out == (10,)


def test_footer_plan_and_json_say_it_when_windows_are_undetermined():
    table = sensitivity_table(runs_frame(DAMAGE), 30, TableOptions(tolerance=0.5))
    assert (table.verdict == "undetermined").any()
    bound = table_bounds(table)[0].bound
    text = format_table(table, WINDOW)
    assert (f"established: a 5-epoch deficit does less than {np.ceil(bound * 100) / 100:.2f} "
            "points of damage at every start measured (95% confidence, Holm over 3 windows)"
            in text)
    answer = plan_from_table(table, 5, 30)
    assert "established: a 5-epoch deficit does less than" in format_plan(answer)
    record = plan_record(answer)
    assert record["established"]["bound"] == pytest.approx(bound)
    assert "damage is below" in format_table(table, REMOVAL)  # one family for all windows
    decided = sensitivity_table(runs_frame(DAMAGE), 30, TableOptions(tolerance=1.5))
    assert "established" not in format_table(decided, WINDOW)  # all safe: nothing to add
    screened = table.assign(confirmed=[True, True, False])
    assert "established" not in format_table(screened, WINDOW)  # family size unknown
    assert "Holm over 12 windows" in format_table(screened, WINDOW, family_size=12)
