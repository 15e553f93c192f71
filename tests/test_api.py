"""The notebook API: load a real (tiny) sweep and get frames, tables and the planner's answer."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import tiny_config
from scipy import stats

import periodscan
from periodscan.analysis.planner import PlanAnswer
from periodscan.api import load_sweep
from periodscan.errors import PeriodscanError, SweepError
from periodscan.jobs.sweep import run_sweep


def build_tiny_sweep(base: Path) -> Path:
    """Train the conftest's tiny config with 3 seeds once per test session (a few seconds)."""
    folder = base / "results" / "tiny"
    if not (folder / "ledger.sqlite").exists():
        run_sweep(tiny_config(base, seeds=3), quiet=True, command="periodscan sweep tiny-test")
    return folder


@pytest.fixture(scope="module")
def sweep_folder(tmp_path_factory) -> Path:
    return build_tiny_sweep(tmp_path_factory.getbasetemp() / "shared_sweep")


def test_load_by_folder_and_by_name(sweep_folder):
    with load_sweep(sweep_folder) as view:
        assert view.name == "tiny" and view.schedule_epochs == 8
    with periodscan.load_sweep("tiny", results_dir=sweep_folder.parent) as view:
        assert view.folder == sweep_folder
        assert view.command == "periodscan sweep tiny-test"


def test_missing_sweep_is_a_clear_error(tmp_path):
    with pytest.raises(SweepError, match="'sweep' argument must be a sweep folder"):
        load_sweep(tmp_path / "nope")
    assert not (tmp_path / "nope").exists()  # reading never creates a ledger
    assert issubclass(SweepError, PeriodscanError)


def test_frames_cover_the_design(sweep_folder):
    with load_sweep(sweep_folder) as view:
        runs, epochs = view.runs, view.epochs
        # 3 seeds x (3 starts x 2 lengths + 1 baseline) runs
        assert len(runs) == 3 * 7 and set(runs.status) == {"done"}
        # every run has one row per epoch along its path through the shared tree
        per_run = epochs.groupby("run_id").epoch.agg(["count", "min", "max"])
        assert (per_run["count"] == 8).all() and (per_run["min"] == 0).all()
        assert view.extras.empty  # the tiny config records no monitor readings


def test_table_damage_is_paired_baseline_minus_run(sweep_folder):
    with load_sweep(sweep_folder) as view:
        table = view.table(tolerance=0.5, confidence=0.9)
        runs = view.runs
    base = runs[runs.is_baseline == 1].set_index("seed").test_acc
    win = runs[(runs.start_epoch == 2) & (runs.length == 3)].set_index("seed").test_acc
    damage = (base - win.reindex(base.index)) * 100
    row = table[(table.start == 2) & (table.length == 3)].iloc[0]
    # Reference: scipy.stats.ttest_rel on the paired per-seed accuracies (in points).
    ci = stats.ttest_rel(base * 100, win.reindex(base.index) * 100).confidence_interval(0.9)
    assert row.damage == pytest.approx(damage.mean())
    assert (row.damage_low, row.damage_high) == pytest.approx((ci.low, ci.high))
    assert row.seeds == 3 and row.tolerance == 0.5 and row.confidence == 0.9
    assert row.verdict in ("critical", "safe", "undetermined")
    assert row.mcnemar_tested == 3


def test_mcnemar_frame_matches_ledger_vectors(sweep_folder):
    with load_sweep(sweep_folder) as view:
        tests = view.mcnemar
        blob, n_test = view.ledger.correctness(tests.run_id.iloc[0])
    assert len(tests) == 3 * 6 and n_test == 300
    bits = np.unpackbits(np.frombuffer(blob, dtype=np.uint8))[:n_test]
    assert bits.size == 300 and set(np.unique(bits)) <= {0, 1}
    assert ((tests.b + tests.c) <= 300).all() and tests.pvalue.between(0, 1).all()


def test_plan_answer_object(sweep_folder):
    with load_sweep(sweep_folder) as view:
        answer = view.plan(length=3, tolerance=50.0, production_epochs=24)
    assert isinstance(answer, PlanAnswer)
    frame = answer.frame()
    assert list(frame.start) == [0, 2, 4]
    assert list(frame.production_start) == [0.0, 6.0, 12.0]
    # Damage of a few points at most on this sweep: far below a 50-point tolerance.
    assert answer.safe_starts == [0, 2, 4] and answer.safe_from == 0
    assert isinstance(frame, pd.DataFrame)


def test_reading_leaves_the_ledger_untouched(sweep_folder):
    ledger = sweep_folder / "ledger.sqlite"
    before = (ledger.stat().st_mtime_ns, ledger.read_bytes())
    with load_sweep(sweep_folder) as view:
        view.table()
        view.status()
    assert (ledger.stat().st_mtime_ns, ledger.read_bytes()) == before
    assert os.access(ledger, os.R_OK)
