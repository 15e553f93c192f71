"""The planner: safe and critical starts, the safe-from epoch, length substitution, mapping."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests
from test_api import build_tiny_sweep

from periodscan.analysis.planner import check_question, choose_length, plan_from_table
from periodscan.analysis.sensitivity import TableOptions, sensitivity_table
from periodscan.cli import main
from periodscan.errors import ConfigError, SweepError
from periodscan.views.plan import format_plan, plan_json, plan_notes

EPOCHS = 30
# Fixed per-seed damages (points) of a 30-epoch schedule: an early sensitive stretch that fades.
DAMAGE = {
    (0, 5): [4.1, 3.6, 4.8, 3.9, 4.3],
    (5, 5): [2.9, 2.2, 3.5, 2.6, 3.1],
    (10, 5): [0.9, -0.4, 2.3, 0.1, 1.6],
    (15, 5): [0.0, 0.1, -0.1, 0.05, 0.0],
    (20, 5): [-0.1, 0.1, 0.0, -0.05, 0.05],
    (25, 5): [0.1, 0.0, -0.1, 0.0, 0.05],
    (0, 10): [6.0, 5.2, 6.9, 5.5, 6.1],
    (10, 10): [1.5, 0.2, 2.9, 0.4, 2.1],
    (20, 10): [0.05, -0.1, 0.1, 0.0, 0.0],
}


def runs_from_damage(damage: dict, base_acc: float = 0.9) -> pd.DataFrame:
    """A runs frame whose window runs lose exactly the given points against their baseline."""
    rows = []
    seeds = len(next(iter(damage.values())))
    for seed in range(seeds):
        rows.append((f"b{seed}", seed, 0, 0, 1, base_acc))
        for (start, length), values in damage.items():
            rows.append((f"w{start}+{length}s{seed}", seed, start, length, 0,
                         base_acc - values[seed] / 100))
    frame = pd.DataFrame(rows, columns=["run_id", "seed", "start_epoch", "length",
                                        "is_baseline", "test_acc"])
    return frame.assign(end_epoch=EPOCHS, status="done", n_test=10_000)


def table(tolerance: float = 0.5, confidence: float = 0.95) -> pd.DataFrame:
    return sensitivity_table(runs_from_damage(DAMAGE), EPOCHS,
                             TableOptions(confidence=confidence, tolerance=tolerance))


def test_plan_names_critical_window_and_safe_slots():
    answer = plan_from_table(table(), 5, EPOCHS, sweep="fixed")
    assert answer.critical_starts == [0, 5]
    assert answer.safe_starts == [15, 20, 25]
    assert answer.undetermined_starts == [10]
    assert answer.safe_from == 15
    assert answer.best_is_safe and answer.best.start in (15, 20, 25)
    assert answer.best.damage == min(np.mean(DAMAGE[(s, 5)]) for s in (15, 20, 25))
    # Cross-check the verdicts with scipy's t test and statsmodels' Holm correction.
    keys = [k for k in DAMAGE if k[1] == 5]
    p = [stats.ttest_1samp(DAMAGE[k], 0.5).pvalue for k in keys]
    reject = multipletests(p, alpha=0.05, method="holm")[0]
    decided = [k[0] for k, r in zip(keys, reject, strict=True) if r]
    assert sorted(answer.critical_starts + answer.safe_starts) == decided
    text = format_plan(answer)
    assert "critical starts: 0, 5" in text and "safe from: epoch 15 (50% of training" in text


def test_safe_from_needs_every_later_start_safe():
    damage = dict(DAMAGE)
    damage[(25, 5)] = [2.0, 1.1, 3.2, 0.9, 2.6]  # a late window that hurts again
    answer = plan_from_table(
        sensitivity_table(runs_from_damage(damage), EPOCHS, TableOptions(tolerance=0.5)), 5,
        EPOCHS)
    assert 25 not in answer.safe_starts and answer.safe_from is None


def test_unmeasured_length_answers_from_nearest_longer():
    answer = plan_from_table(table(), 7, EPOCHS)
    assert (answer.length_asked, answer.length_used, answer.length_measured) == (7, 10, False)
    assert [s.start for s in answer.starts] == [0, 10, 20]
    notes = plan_notes(answer)
    assert "not measured" in notes[0] and "10 epochs" in notes[0]
    assert choose_length(3, [5, 10]) == 5 and choose_length(5, [5, 10]) == 5
    with pytest.raises(SweepError, match="'length' parameter must be at most"):
        plan_from_table(table(), 12, EPOCHS)


def test_production_mapping_scales_by_fraction_of_training():
    answer = plan_from_table(table(), 5, EPOCHS, production_epochs=90)
    assert [s.production_start for s in answer.starts] == [0, 15, 30, 45, 60, 75]
    assert [s.start_frac for s in answer.starts] == pytest.approx([0, 1 / 6, 1 / 3, 0.5,
                                                                    2 / 3, 5 / 6])
    assert any("fraction of training" in n for n in plan_notes(answer))
    assert "production epoch 45" in format_plan(answer)


def test_a_stricter_tolerance_or_confidence_decides_less():
    loose = plan_from_table(table(0.5, 0.9), 5, EPOCHS)
    strict = plan_from_table(table(0.5, 0.999), 5, EPOCHS)
    decided = len(loose.safe_starts) + len(loose.critical_starts)
    assert len(strict.safe_starts) + len(strict.critical_starts) <= decided


def test_json_is_plain_and_complete():
    answer = plan_from_table(table(), 5, EPOCHS, production_epochs=60)
    data = json.loads(plan_json(answer))
    assert data["critical_starts"] == [0, 5] and data["safe_from"] == 15
    undetermined = [s for s in data["starts"] if s["verdict"] == "undetermined"][0]
    assert undetermined["more_seeds"] >= 1  # start 10: a finite count within the cap
    decided = [s for s in data["starts"] if s["verdict"] != "undetermined"][0]
    assert decided["more_seeds"] is None  # NaN becomes null, never the invalid token NaN
    assert "NaN" not in plan_json(answer)


@pytest.mark.parametrize("field, args", [
    ("length", (0, 0.5, 0.95, None)),
    ("tolerance", (5, -1.0, 0.95, None)),
    ("confidence", (5, 0.5, 1.0, None)),
    ("production_epochs", (5, 0.5, 0.95, 0)),
])
def test_bad_questions_name_the_field(field, args):
    with pytest.raises(ConfigError, match=f"'{field}' parameter"):
        check_question(*args)


def test_cli_plan_json_and_error(tmp_path_factory, capsys):
    folder = build_tiny_sweep(tmp_path_factory.getbasetemp() / "shared_sweep")
    args = ["plan", str(folder), "--length", "3", "--tolerance", "50", "--json"]
    capsys.readouterr()
    assert main(args) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["length_used"] == 3 and data["safe_starts"] == [0, 2, 4]
    assert not math.isnan(data["starts"][0]["damage"])
    assert main(["plan", str(folder), "--length", "9"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "'length' parameter" in err
