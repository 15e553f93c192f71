"""The forecast: its rule on hand-worked curves, the trunk-only tree, and the folder it shares
with the sweep (trunks trained by a forecast are reused by the sweep, and trunks trained by a
sweep are replayed exactly to get their readings)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from periodscan.cli import main
from periodscan.fisher import TOTAL
from periodscan.fisher.rule import Phase, critical_phase, mean_curve, window_scores
from periodscan.jobs.forecast import forecast, trunk_tree
from periodscan.jobs.prepare import prepare
from periodscan.jobs.sweep import run_sweep
from periodscan.ledger import Ledger

# --- the rule, on curves worked by hand ---------------------------------------------------------


def test_phase_is_the_half_height_run_around_the_peak():
    curve = [0, 1, 3, 6, 10, 6, 3, 1, 0, 0]
    # peak 10 at epoch 4, floor 0, half height 5: epochs 3, 4, 5 are at or above it
    assert critical_phase(curve) == Phase(begin=3, end=6, peak=4, threshold=5.0, epochs=10)
    # A 3-epoch moving average (edges repeat the end value): 0.33 1.33 3.33 6.33 7.33 6.33
    # 3.33 1.33 0.33 0; half height 3.67 keeps epochs 3-5 again.
    smoothed = critical_phase(curve, width=3)
    assert (smoothed.begin, smoothed.end, smoothed.peak) == (3, 6, 4)
    assert smoothed.threshold == pytest.approx(22 / 6)
    assert smoothed.fraction == (0.3, 0.6)


def test_phase_height_is_measured_from_the_floor():
    curve = [5, 5, 6, 8, 9, 8, 6, 5, 5, 5]  # floor 5, peak 9: half height 7
    phase = critical_phase(curve)
    assert (phase.begin, phase.end, phase.threshold) == (3, 6, 7.0)
    assert critical_phase(curve, epochs=20).fraction == (0.15, 0.3)


def test_phase_reaches_the_edges():
    assert critical_phase([9, 8, 1, 0]) == Phase(0, 2, 0, 4.5, 4)
    assert critical_phase([0, 1, 8, 9]) == Phase(2, 4, 3, 4.5, 4)


def test_window_scores_are_shares_of_the_summed_trace():
    curve = np.array([1.0, 1.0, 2.0, 4.0, 2.0])
    phase = Phase(2, 4, 3, 2.5, 5)
    scores = window_scores(curve, [(0, 2), (1, 2), (3, 5)], phase)
    assert scores.score.tolist() == pytest.approx([0.2, 0.3, 0.6])  # (1+1)/10, (1+2)/10, (4+2)/10
    assert scores.overlap.tolist() == [0, 1, 1]
    assert scores.at_risk.tolist() == [False, True, True]


def test_mean_curve_interpolates_each_seed_then_averages():
    readings = pd.DataFrame({"seed": [0, 0, 0] + [1] * 5, "epoch": [0, 2, 4, 0, 1, 2, 3, 4],
                             "value": [0.0, 2.0, 4.0, 4, 4, 4, 4, 4]})
    assert mean_curve(readings, 5).tolist() == [2.0, 2.5, 3.0, 3.5, 4.0]


# --- the trunk-only tree --------------------------------------------------------------------------


def test_trunk_tree_keeps_the_sweeps_segments_and_checkpoints(make_config):
    prep = prepare(make_config(seeds=3))
    trunks = trunk_tree(prep.tree, [0, 2])
    assert {r.seed for r in trunks.runs.values()} == {0, 2}
    assert all(r.is_baseline for r in trunks.runs.values())
    for sid, seg in trunks.segments.items():
        full = prep.tree.segments[sid]
        assert not seg.deficit_on and (seg.begin, seg.end, seg.parent) == (
            full.begin, full.end, full.parent)
        # Stores a checkpoint exactly where the sweep's trunk does (the branch points).
        assert bool(seg.children) == bool(full.children)
    assert sum(s.epochs for s in trunks.segments.values()) == 2 * 8


# --- forecast and sweep share a folder ---------------------------------------------------------


def _segments(folder) -> pd.DataFrame:
    ledger = Ledger(folder)
    try:
        return ledger.segments_frame().set_index("segment_id")
    finally:
        ledger.close()


def _readings(outcome) -> pd.DataFrame:
    return outcome.readings.sort_values(["seed", "name", "epoch"]).reset_index(drop=True)


def test_sweep_after_forecast_reuses_the_trunks(make_config):
    cfg = make_config(seeds=2)
    ahead = forecast(cfg, quiet=True)
    assert ahead.epochs_trained == 2 * 8
    assert ahead.remaining_epochs == ahead.sweep_epochs - 2 * 8  # the branches are left
    assert ahead.scores[["start", "length"]].values.tolist() == [
        [0, 3], [0, 4], [2, 3], [2, 4], [4, 3], [4, 4]]
    totals = ahead.readings[ahead.readings.name == TOTAL]
    assert sorted(totals.groupby("seed").epoch.apply(list).sum()) == sorted(list(range(8)) * 2)
    assert 0 <= ahead.phase.begin <= ahead.phase.peak < ahead.phase.end <= 8
    assert (ahead.folder / "forecast.csv").is_file()
    trunk_done = _segments(ahead.folder).query("status == 'done'").finished_at

    swept = run_sweep(cfg, quiet=True)
    after = _segments(swept.folder)
    assert (after.loc[trunk_done.index].finished_at == trunk_done).all()  # not trained again
    assert (after.status == "done").all()
    alone = run_sweep(make_config(seeds=2, name="alone"), quiet=True)
    pd.testing.assert_frame_equal(  # reusing the forecast's trunks changes no number
        swept.table.drop(columns=[c for c in swept.table if "seconds" in c]),
        alone.table.drop(columns=[c for c in alone.table if "seconds" in c]))

    again = forecast(cfg, quiet=True)  # everything in place: nothing to train
    assert again.epochs_trained == 0 and again.remaining_epochs == 0
    pd.testing.assert_frame_equal(_readings(again), _readings(ahead))


def test_forecast_after_a_plain_sweep_replays_the_trunks(make_config):
    run_sweep(make_config(seeds=1), quiet=True)  # no monitor: no readings stored
    replayed = forecast(make_config(seeds=1), quiet=True)
    assert replayed.epochs_trained == 8
    fresh = forecast(make_config(seeds=1, name="fresh"), quiet=True)
    pd.testing.assert_frame_equal(_readings(replayed), _readings(fresh))  # bit for bit
    assert replayed.phase == fresh.phase


def test_cli_forecast(tmp_path, capsys):
    code = main(["forecast", "experiment=tiny", f"results_dir={tmp_path}", "--seeds", "1",
                 "-q"])
    out = capsys.readouterr().out
    assert code == 0
    assert "predicted critical window: epochs [" in out and "of the 8-epoch schedule" in out
    assert "periodscan sweep experiment=tiny" in out
    assert main(["forecast", "experiment=tiny", f"results_dir={tmp_path}", "--seeds", "5"]) == 2
    assert "--seeds" in capsys.readouterr().err
