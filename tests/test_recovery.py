"""Still recovering or lasting: the paired gap's trend after each window.

Checked against scipy (``linregress`` for each seed's slope and its standard error,
``ttest_1samp`` for the interval and test over seeds) and statsmodels (Holm), on a label-noise
sweep built to recover slowly (about 15 s of training) and on the demo's recorded late epochs.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from periodscan.analysis.recovery import (
    KEYS,
    MAY_REACH,
    RECOVERY_COLUMNS,
    WITHIN,
    fit_span,
    gap_curves,
    join_recovery,
    ols_slope,
    recovery_frame,
    seed_slopes,
)
from periodscan.analysis.sensitivity import COLUMNS
from periodscan.analysis.verdicts import VERDICT_COLUMNS
from periodscan.api import load_sweep
from periodscan.cli import main
from periodscan.jobs.sweep import run_sweep
from periodscan.views.plan import format_plan, plan_record
from periodscan.views.tables import format_table

#: Label noise with fixed noisy labels (rate 0.6) for 4 epochs, late in a 24-epoch schedule: the
#: small CNN collapses during the window and is still climbing back at the last epoch. Start 0
#: has 20 clean epochs after it and settles.
SLOW = ["experiment=tiny", "data=digits", "data.n_train=600", "data.n_test=null", "model=cnn2d",
        "model.channels=16", "deficit=label_noise", "deficit.rate=0.6", "schedule.epochs=24",
        "schedule.optimizer.lr=0.02", "design.starts=[0,16]", "design.lengths=[4]", "seeds=5",
        "tolerance=1", "name=slow"]
#: Test accuracy of the demo sweep (`periodscan sweep`, 10 seeds) over epochs 45-59, for the
#: baselines and the windows starting at 20, 30 and 40, read from its ledger (view.epochs).
DEMO_LATE = Path(__file__).parent / "recorded" / "demo_late_epochs.csv"


@pytest.fixture(scope="module")
def slow(tmp_path_factory) -> Path:
    base = tmp_path_factory.mktemp("recovery")
    run_sweep([*SLOW, f"results_dir={base}"], quiet=True)
    return base / "slow"


def demo_frames() -> tuple[pd.DataFrame, pd.DataFrame]:
    """Runs and epochs frames, shaped as a ledger gives them, from the recorded demo epochs."""
    rec = pd.read_csv(DEMO_LATE)
    rec["run_id"] = [f"s{s}-{b}-{t}" for s, b, t in zip(rec.seed, rec.is_baseline, rec.start,
                                                       strict=True)]
    runs = rec.drop_duplicates("run_id").rename(columns={"start": "start_epoch",
                                                         "end": "end_epoch"})
    runs = runs.assign(status="done", variant="")
    runs.loc[runs.is_baseline == 1, ["start_epoch", "length"]] = 0
    return runs, rec[["run_id", "epoch", "test_acc"]]


def test_fit_span_is_a_tenth_of_the_schedule_and_at_least_four():
    assert [fit_span(n) for n in (8, 24, 40, 41, 60, 200)] == [4, 4, 4, 5, 6, 20]


def test_ols_slope_matches_linregress():
    rng = np.random.default_rng(3)
    for n in (3, 4, 6, 11):
        x = np.arange(n) + 17.0
        y = rng.normal(size=n) * 3 - 0.7 * x
        slope, stderr = ols_slope(x, y)
        ref = stats.linregress(x, y)  # reference: scipy.stats.linregress
        assert slope == pytest.approx(ref.slope, rel=1e-10)
        assert stderr == pytest.approx(ref.stderr, rel=1e-10)
    assert ols_slope([1, 2], [5, 3])[0] == pytest.approx(-2.0)
    assert np.isnan(ols_slope([1, 2], [5, 3])[1]) and np.isnan(ols_slope([4], [1])[0])


def test_each_seeds_slope_matches_linregress_on_the_sweep(slow):
    with load_sweep(slow) as view:
        runs, epochs = view.runs, view.epochs
    slopes = seed_slopes(gap_curves(runs, epochs), fit_span(24))
    assert len(slopes) == 2 * 5 and set(slopes.fit_epochs) == {4}
    # The gap rebuilt independently: baseline and window accuracy per (run, epoch).
    acc = epochs.set_index(["run_id", "epoch"]).test_acc
    ids = runs.set_index(["seed", "is_baseline", "start_epoch"]).run_id
    last = np.arange(20, 24)  # the 4 last epochs: every window has 4 or more clean epochs
    for row in slopes.itertuples():
        base, run = ids[(row.seed, 1, 0)], ids[(row.seed, 0, row.start)]
        gap = [(acc[(base, e)] - acc[(run, e)]) * 100 for e in last]
        ref = stats.linregress(last, gap)  # reference: scipy.stats.linregress
        assert row.slope == pytest.approx(ref.slope, rel=1e-9, abs=1e-9)
        assert row.stderr == pytest.approx(ref.stderr, rel=1e-9, abs=1e-9)


def test_interval_test_and_holm_match_scipy_and_statsmodels(slow):
    with load_sweep(slow) as view:
        frame = view.recovery()
        slopes = seed_slopes(gap_curves(view.runs, view.epochs), fit_span(24))
    rate = 1.0 / 4  # tolerance 1 point over a fit span of 4 epochs
    assert (frame.recovery_rate == rate).all()
    pvalues = []
    for row in frame.itertuples():
        mine = slopes[slopes.start == row.start].slope
        ci = stats.ttest_1samp(mine, 0.0).confidence_interval(0.95)  # reference: scipy
        assert (row.slope_low, row.slope_high) == pytest.approx((ci.low, ci.high), rel=1e-9)
        test = stats.ttest_1samp(mine, -rate)  # reference: scipy, two-sided
        assert row.recovery_p == pytest.approx(test.pvalue, rel=1e-9)
        pvalues.append(test.pvalue)
    holm = multipletests(pvalues, method="holm")[1]  # reference: statsmodels (Holm by name)
    assert frame.recovery_p_holm.to_numpy() == pytest.approx(holm, rel=1e-9)


def test_flag_fires_on_slow_label_noise_recovery_and_not_on_the_settled_start(slow):
    with load_sweep(slow) as view:
        table = view.table(recovery=True)
        curves = gap_curves(view.runs, view.epochs)
    late, early = table.set_index("start").loc[16], table.set_index("start").loc[0]
    # The case the flag is for: critical at the end, while the gap still falls every epoch.
    mean_gap = curves[curves.start == 16].groupby("epoch").gap.mean()
    assert late.verdict == "critical" and (np.diff(mean_gap.to_numpy()) < 0).all()
    assert late.still_recovering and late.slope < -late.recovery_rate
    assert late.slope_holm_high < 0 and late.recovery_p_holm <= 0.05
    assert late.settle == MAY_REACH and late.suggested_recovery_epochs >= 4 + fit_span(24)
    assert not early.still_recovering and abs(early.slope) < early.recovery_rate
    print(f"\nstart 16: damage {late.damage:+.2f}, mean gap over epochs 20-23 "
          f"{np.round(mean_gap.to_numpy(), 2)}, slope {late.slope:+.2f} "
          f"[{late.slope_low:+.2f}, {late.slope_high:+.2f}]; start 0: slope {early.slope:+.3f}")


@pytest.mark.parametrize("tolerance", [0.5, 0.0])
def test_demo_late_starts_settled_and_start_40_still_recovering(tolerance):
    runs, epochs = demo_frames()
    frame = recovery_frame(runs, epochs, 60, tolerance=tolerance, confidence=0.95)
    frame = frame.set_index("start")
    assert list(frame.fit_epochs) == [6, 6, 5]  # start 40 has 5 clean epochs only
    assert not frame.loc[20, "still_recovering"] and not frame.loc[30, "still_recovering"]
    assert frame.loc[40, "still_recovering"]  # its gap falls ~0.5 points/epoch at the end
    # Its mean gap (+0.39) is within 0.5 points already; against 0 it still has a way to go.
    assert frame.loc[40, "settle"] == {0.5: WITHIN, 0.0: MAY_REACH}[tolerance]


def test_table_view_plan_and_csv(slow, capsys):
    with load_sweep(slow) as view:
        text = format_table(view.table(recovery=True), view.layout)
        answer = view.plan()
    flagged = [line for line in text.splitlines() if "still recovering" in line]
    assert len(flagged) == 1 and flagged[0].strip().startswith("[16, 20)")
    words = format_plan(answer)
    assert "still recovering (" in words and "design.recovery_epochs=" in words
    record = json.loads(json.dumps(plan_record(answer)))
    trends = {s["start"]: s["trend"] for s in record["starts"]}
    assert trends[16]["still_recovering"] and not trends[0]["still_recovering"]
    assert "still_recovering" in [f["code"] for f in record["facts"]]
    # The sweep's CSV keeps its columns: the trend is joined only for views.
    header = (slow / "sensitivity.csv").read_text().splitlines()[0].split(",")
    assert header == COLUMNS + VERDICT_COLUMNS
    assert main(["plan", str(slow), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["starts"][1]["trend"]["settle"] == MAY_REACH


def test_join_keeps_variants_apart():
    table = pd.DataFrame({"variant": ["a", "b"], "start": [0, 0], "length": [4, 4],
                          "damage": [1.0, 2.0]})
    trend = pd.DataFrame([{**dict(zip(KEYS, key, strict=True)),
                           **dict.fromkeys(RECOVERY_COLUMNS, np.nan), "slope": slope,
                           "still_recovering": slope < -1}
                          for key, slope in ((("b", 0, 4), -5.0), (("a", 0, 4), 0.0))])
    joined = join_recovery(table, trend)
    assert list(joined.slope) == [0.0, -5.0] and list(joined.still_recovering) == [False, True]
    with pytest.raises(ValueError, match="several variants"):
        join_recovery(table.drop(columns="variant"), trend)


def test_fixed_recovery_windows_pair_with_their_own_baseline_and_skip_diverged_seeds():
    # Two seeds; under fixed_recovery each window gets 5 clean epochs and a baseline ending
    # where it ends. Baseline accuracy 0.9 at every epoch; window runs recover linearly.
    runs, epochs = [], []
    for seed in (0, 1):
        for end in (9, 13):
            runs.append(dict(run_id=f"b{seed}-{end}", seed=seed, start_epoch=0, length=0,
                             end_epoch=end, is_baseline=1, status="done", variant=""))
            epochs += [dict(run_id=f"b{seed}-{end}", epoch=e, test_acc=0.9) for e in range(end)]
        for start, end in ((0, 9), (4, 13)):
            rid = f"w{seed}-{start}"
            runs.append(dict(run_id=rid, seed=seed, start_epoch=start, length=4, end_epoch=end,
                             is_baseline=0, status="diverged" if rid == "w1-4" else "done",
                             variant=""))
            acc = [0.5 + 0.05 * (e - start) for e in range(end)]
            if rid == "w1-4":
                acc[-1] = float("nan")  # the run diverged at its last epoch
            epochs += [dict(run_id=rid, epoch=e, test_acc=a) for e, a in enumerate(acc)]
    curves = gap_curves(pd.DataFrame(runs), pd.DataFrame(epochs))
    assert set(curves.groupby(["start", "seed"]).epoch.count()) <= {4, 5}
    assert curves[curves.start == 4].epoch.min() == 8 and curves.end.max() == 13
    slopes = seed_slopes(curves, 4)
    assert np.isnan(slopes.set_index(["start", "seed"]).slope[(4, 1)])  # missing an epoch
    assert slopes.slope.dropna().to_numpy() == pytest.approx([-5.0] * 3)  # points per epoch
    frame = recovery_frame(pd.DataFrame(runs), pd.DataFrame(epochs), 13, tolerance=0.5)
    assert list(frame.clean_epochs) == [5, 5] and list(frame.slope_seeds) == [2, 1]
