"""design=onset: its runs and tree, bad configs, the delay-cost table and the latest-onset plan.

The paired statistics are checked against scipy.stats.ttest_rel (the paired t test and its
confidence interval) and Holm against statsmodels' multipletests(method="holm").
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from periodscan.analysis.onset import delay_costs
from periodscan.analysis.onset_plan import DELAY_COST, LATER_WITHIN, EpochAnswer
from periodscan.analysis.verdicts import CRITICAL, SAFE, UNDETERMINED
from periodscan.cli import main
from periodscan.config import TRAINING_KEYS
from periodscan.designs import load_design
from periodscan.engine.segment import train_from_scratch
from periodscan.errors import ConfigError
from periodscan.jobs.prepare import prepare
from periodscan.jobs.sweep import run_sweep
from periodscan.ledger import Ledger
from periodscan.views.onset import epoch_plan_json, format_epoch_plan

ONSET = {"kind": "onset", "onsets": [2, 5]}


# --- runs and tree -------------------------------------------------------------------------

def test_onset_runs_add_the_reference_and_last_to_the_end(make_config):
    prep = prepare(make_config(design=ONSET, seeds=2))
    runs = {(r.seed, r.start, r.length, r.end) for r in prep.tree.runs.values()}
    expected = set()
    for seed in (0, 1):  # baseline, onset 0 (always run: the reference), 2 and 5
        expected |= {(seed, 0, 0, 8), (seed, 0, 8, 8), (seed, 2, 6, 8), (seed, 5, 3, 8)}
    assert runs == expected


def test_onsets_branch_from_the_baseline_trunk(make_config):
    prep = prepare(make_config(design=ONSET, seeds=2))
    tree = prep.tree
    # Per seed: baseline trunk 8 + onset-0 root 8 + branches 6 and 3 = 25 epochs, not 4 x 8.
    assert tree.epochs_unshared == 2 * 4 * 8
    assert tree.epochs_shared == 2 * 25
    base = tree.paths["seed0-baseline-to8"]
    late = tree.paths["seed0-w5+3-to8"]
    shared = tree.segments[late[-2]]
    assert late[:-1] == [s for s in base if tree.segments[s].end <= 5]
    assert shared.end == 5 and not shared.deficit_on
    assert tree.segments[late[-1]].deficit_on and tree.segments[late[-1]].end == 8


@pytest.mark.parametrize("onsets, words", [
    ([8], ["design.onsets", "[0, 7]", "schedule.epochs is 8"]),
    ([2, 12], ["design.onsets", "[0, 7]"]),
    ([], ["design.onsets", "non-empty list of distinct epochs"]),
    ([3, 3], ["design.onsets", "distinct"]),
    ([-1], ["design.onsets", "ints >= 0"]),
    (None, ["design.onsets", "Got None"]),
])
def test_bad_onsets_name_the_field(make_config, onsets, words):
    with pytest.raises(ConfigError) as info:
        prepare(make_config(design={"kind": "onset", "onsets": onsets}))
    for word in words:
        assert word in str(info.value)


def test_onset_design_composes_from_its_config_group():
    from periodscan.config import compose_config, to_plain

    plain = to_plain(compose_config(["design=onset", "design.onsets=[10,30]"]))
    design = load_design(plain, [0])
    assert design.onsets() == [0, 10, 30]
    assert design.layout.window_label(10, 50) == "from epoch 10"


# --- numbers by hand -----------------------------------------------------------------------

EPOCHS = 40
BASE = [0.900, 0.910, 0.905, 0.895, 0.900, 0.915]
#: Accuracy of each onset's run per seed: onset 0 is the reference; 10 costs nothing, 20 a
#: little, 30 much more than the tolerance.
ACC = {
    0: [0.930, 0.935, 0.940, 0.925, 0.932, 0.945],
    10: [0.931, 0.933, 0.941, 0.926, 0.930, 0.946],
    20: [0.928, 0.934, 0.938, 0.925, 0.931, 0.942],
    30: [0.905, 0.915, 0.912, 0.900, 0.910, 0.925],
}
TOLERANCE = 0.5


def hand_design(onsets=(10, 20, 30)):
    plain = {"design": {"kind": "onset", "onsets": list(onsets)},
             "schedule": {"epochs": EPOCHS}, "confidence": 0.95, "tolerance": TOLERANCE}
    return load_design(plain, list(range(len(BASE))))


def hand_runs(acc=ACC) -> pd.DataFrame:
    """A runs frame for the hand design: every run finished with the accuracy above."""
    rows = []
    for spec in hand_design(sorted(t for t in acc if t)).preview():
        value = BASE[spec.seed] if spec.is_baseline else acc[spec.start][spec.seed]
        rows.append({"run_id": spec.run_id, "seed": spec.seed, "start_epoch": spec.start,
                     "length": spec.length, "end_epoch": spec.end,
                     "is_baseline": int(spec.is_baseline), "status": "done", "test_acc": value,
                     "n_test": 10_000})
    return pd.DataFrame(rows)


def points(values) -> np.ndarray:
    return np.asarray(values) * 100


def test_delay_cost_is_the_paired_difference_from_onset_zero():
    costs = delay_costs(hand_runs())
    for onset in (10, 20, 30):
        np.testing.assert_allclose(costs[onset], points(ACC[0]) - points(ACC[onset]),
                                   atol=1e-9)


def test_table_has_damage_vs_never_and_delay_interval_like_ttest_rel():
    design = hand_design()
    runs = hand_runs()
    table = design.table(runs, 0.95, TOLERANCE)
    assert list(table.start) == [0, 10, 20, 30]
    assert not table.short_recovery.any()  # an onset has no recovery by design
    np.testing.assert_allclose(table.damage, [np.mean(points(BASE) - points(ACC[t]))
                                              for t in (0, 10, 20, 30)], atol=1e-9)
    assert np.isnan(table.delay_cost.iloc[0]) and table.delay_seeds.iloc[0] == 0
    for i, onset in enumerate((10, 20, 30), start=1):
        # Source: scipy.stats.ttest_rel(a, b).confidence_interval(), the paired t interval of
        # mean(a - b); here a = onset-0 accuracy, b = onset-t accuracy, same seed.
        ci = stats.ttest_rel(points(ACC[0]), points(ACC[onset])).confidence_interval(0.95)
        assert table.delay_low.iloc[i] == pytest.approx(ci.low, abs=1e-9)
        assert table.delay_high.iloc[i] == pytest.approx(ci.high, abs=1e-9)
        assert table.delay_seeds.iloc[i] == len(BASE)


def test_plan_latest_onset_against_scipy_and_statsmodels():
    design = hand_design()
    runs = hand_runs()
    answer = design.plan(runs, design.table(runs, 0.95, TOLERANCE))
    assert isinstance(answer, EpochAnswer) and answer.judged == DELAY_COST
    # Source: scipy.stats.ttest_rel(a - tolerance, b) is the two-sided paired t test of
    # "mean(a - b) = tolerance"; Holm as statsmodels multipletests(method="holm").
    pvalues = [stats.ttest_rel(points(ACC[0]) - TOLERANCE, points(ACC[t])).pvalue
               for t in (10, 20, 30)]
    reject, adjusted, _, _ = multipletests(pvalues, alpha=0.05, method="holm")
    means = [np.mean(points(ACC[0]) - points(ACC[t])) for t in (10, 20, 30)]
    expected = [(SAFE if m < TOLERANCE else CRITICAL) if r else UNDETERMINED
                for r, m in zip(reject, means, strict=True)]
    assert [r.verdict for r in answer.rows] == expected == [SAFE, SAFE, CRITICAL]
    frame = answer.frame()
    np.testing.assert_allclose(frame.value, means, atol=1e-9)
    assert answer.latest == 20
    assert answer.reference.epoch == 0 and answer.reference.damage == pytest.approx(
        np.mean(points(BASE) - points(ACC[0])))
    # The Holm bound of the smallest p-value is the t interval at level alpha / 3.
    first = int(np.argmin(pvalues))
    ci = stats.ttest_rel(points(ACC[0]), points(ACC[(10, 20, 30)[first]])).confidence_interval(
        1 - 0.05 / 3)
    assert answer.rows[first].holm_low == pytest.approx(ci.low, abs=1e-9)
    assert answer.rows[first].holm_high == pytest.approx(ci.high, abs=1e-9)
    np.testing.assert_allclose(frame.p_value, pvalues, rtol=1e-9)
    np.testing.assert_allclose(frame.p_holm, adjusted, rtol=1e-9)


def test_plan_takes_only_the_leading_stretch_within_tolerance():
    acc = dict(ACC)
    acc[10], acc[30] = ACC[30], ACC[10]  # onset 10 now costs much, 30 nothing
    design = hand_design()
    runs = hand_runs(acc)
    answer = design.plan(runs, design.table(runs, 0.95, TOLERANCE))
    assert [r.verdict for r in answer.rows] == [CRITICAL, SAFE, SAFE]
    assert answer.latest is None
    later = [f for f in answer.facts if f.code == LATER_WITHIN]
    assert later and later[0].starts == (20, 30)
    text = format_epoch_plan(answer)
    assert "latest onset within tolerance: none" in text
    assert "Epoch(s) 20, 30 are within the tolerance but come after" in text


def test_plan_refuses_a_length_and_words_say_the_question():
    design = hand_design()
    runs = hand_runs()
    table = design.table(runs, 0.95, TOLERANCE)
    with pytest.raises(ConfigError, match="'length' parameter must be None for an onset"):
        design.plan(runs, table, length=5)
    answer = design.plan(runs, table, production_epochs=120)
    text = format_epoch_plan(answer)
    assert "costs at most 0.5 points more than making it at epoch 0" in text
    assert "latest onset within tolerance: epoch 20 (50% of training; production epoch 60)" \
        in text
    record = json.loads(epoch_plan_json(answer))
    assert record["latest"] == 20 and record["rows"][2]["verdict"] == CRITICAL
    assert "NaN" not in epoch_plan_json(answer)


# --- end to end on the tiny preset ---------------------------------------------------------

def test_onset_sweep_plan_and_branch_equal_from_scratch(make_config, capsys):
    cfg = make_config(design={"kind": "onset", "onsets": [4]}, seeds=2)
    outcome = run_sweep(cfg, quiet=True)
    assert set(outcome.table.start) == {0, 4} and "delay_cost" in outcome.table
    folder = outcome.folder
    assert main(["plan", str(folder)]) == 0
    out = capsys.readouterr().out
    assert "Plan for a change kept to the end of training" in out and "reference" in out
    assert main(["plan", str(folder), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["judged"] == DELAY_COST

    # The onset run branched at epoch 4 from the trunk trains exactly like a from-scratch run.
    prep = prepare(cfg)
    training = {k: prep.plain[k] for k in TRAINING_KEYS}
    run = prep.tree.runs["seed1-w4+4-to8"]
    _, _, records = train_from_scratch(training, run)
    reference = pd.DataFrame([vars(r) for r in records])
    epochs = Ledger(folder).epochs_frame()
    mine = epochs[epochs.run_id == run.run_id].sort_values("epoch")
    for column in ("train_loss", "train_acc", "test_loss", "test_acc", "lr"):
        np.testing.assert_array_equal(mine[column].to_numpy(), reference[column].to_numpy())


# --- the removal design's answer (same module) ---------------------------------------------

def test_removal_plan_takes_the_table_verdicts_and_the_leading_stretch():
    plain = {"design": {"kind": "removal", "until": [5, 10, 20], "budget": "fixed_total",
                        "recovery_epochs": None},
             "schedule": {"epochs": EPOCHS}, "confidence": 0.95, "tolerance": TOLERANCE}
    design = load_design(plain, list(range(len(BASE))))
    cost = {5: [0.0, 0.1, -0.1, 0.05, 0.0, -0.05], 10: [0.1, 0.0, 0.2, -0.1, 0.1, 0.0],
            20: [3.0, 2.5, 3.5, 2.8, 3.1, 2.9]}
    rows = []
    for spec in design.preview():
        lost = 0.0 if spec.is_baseline else cost[spec.length][spec.seed] / 100
        rows.append({"run_id": spec.run_id, "seed": spec.seed, "start_epoch": spec.start,
                     "length": spec.length, "end_epoch": spec.end,
                     "is_baseline": int(spec.is_baseline), "status": "done",
                     "test_acc": BASE[spec.seed] - lost, "n_test": 10_000})
    runs = pd.DataFrame(rows)
    table = design.table(runs, 0.95, TOLERANCE)
    answer = design.plan(runs, table)
    assert [r.epoch for r in answer.rows] == [5, 10, 20]
    assert [r.verdict for r in answer.rows] == list(table.sort_values("length").verdict)
    assert [r.verdict for r in answer.rows] == [SAFE, SAFE, CRITICAL]
    assert answer.latest == 10
    # Source: scipy.stats.ttest_1samp(damages, tolerance), the window verdicts' test.
    p20 = stats.ttest_1samp(cost[20], TOLERANCE).pvalue
    assert answer.rows[2].p_value == pytest.approx(p20, rel=1e-9)
    assert "may last until: epoch 10 (25% of training)" in format_epoch_plan(answer)
