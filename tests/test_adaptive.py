"""The adaptive design: refinement logic on hand-made verdicts, and one real tiny run."""

from __future__ import annotations

import pandas as pd
import pytest

from periodscan.analysis.planner import SCREENED
from periodscan.api import load_sweep
from periodscan.designs.adaptive_search import boundaries, coarse, next_round
from periodscan.errors import ConfigError
from periodscan.jobs.sweep import run_sweep
from periodscan.views.plan import plan_notes


def run_adaptive(overrides: list[str]):
    """The sweep job on design=adaptive, with the seeds per start its design settled on."""
    outcome = run_sweep(overrides, quiet=True)
    with load_sweep(outcome.folder) as view:
        seeds = view.design.seeds_per_start
    return outcome, seeds

SETTINGS = {"resolution": 1, "seeds_initial": 3, "seeds_max": 7, "tolerance": 0.5}


def _table(verdicts: dict[int, str], damage: dict[int, float] | None = None) -> pd.DataFrame:
    damage = damage or {s: 0.0 for s in verdicts}
    return pd.DataFrame({"start": list(verdicts), "verdict": list(verdicts.values()),
                         "damage": [damage[s] for s in verdicts]})


def test_coarse_pass_includes_the_last_start():
    assert coarse(0, 45, 8) == [0, 8, 16, 24, 32, 40, 45]
    assert coarse(0, 40, 8) == [0, 8, 16, 24, 32, 40]


def test_first_the_latest_possibly_critical_start_and_the_last_start_go_to_the_cap():
    seeds = {0: 3, 8: 3, 16: 3, 24: 3}
    table = _table(dict.fromkeys(seeds, "undetermined"), {0: 2.0, 8: 1.2, 16: 0.1, 24: 0.3})
    # 8 is the latest start whose interim mean is above the tolerance; 24 anchors the safe edge.
    assert next_round(table, seeds, SETTINGS) == {8: 7, 24: 7}


def test_interim_mean_below_the_tolerance_screens_a_start_out_as_critical_candidate():
    seeds = {0: 7, 8: 3, 16: 3, 24: 7}
    table = _table({0: "critical", 8: "undetermined", 16: "undetermined", 24: "undetermined"},
                   {0: 2.0, 8: 0.4, 16: 0.1, 24: 0.3})
    # 8 and 16 are screened (mean <= 0.5); 24 is not safe at the cap: no safe stretch. The
    # critical edge lies between 0 and 8: bisect at 4 with the interim seeds.
    assert next_round(table, seeds, SETTINGS) == {4: 3}


def test_critical_edge_at_the_resolution_caps_both_sides_then_stops():
    seeds = {0: 7, 4: 7, 5: 3, 8: 3, 24: 7}
    damage = {0: 2.0, 4: 1.5, 5: 0.3, 8: 0.4, 24: 0.3}
    table = _table({0: "critical", 4: "critical", 5: "undetermined", 8: "undetermined",
                    24: "undetermined"}, damage)
    assert next_round(table, seeds, SETTINGS) == {5: 7}
    seeds[5] = 7
    table = _table({0: "critical", 4: "critical", 5: "undetermined", 8: "undetermined",
                    24: "undetermined"}, damage)
    assert next_round(table, seeds, SETTINGS) == {}
    assert boundaries(table) == (4, None)


def test_a_later_start_above_the_tolerance_is_checked_before_the_edge_is_accepted():
    # 0 is critical, but 16's interim mean is above the tolerance: it is raised to the cap.
    # For the safe edge 16 blocks (not safe by its mean) and 24 is safe: bisect at 20.
    seeds = {0: 7, 8: 3, 16: 3, 24: 7}
    table = _table({0: "critical", 8: "undetermined", 16: "undetermined", 24: "safe"},
                   {0: 2.0, 8: 0.2, 16: 0.9, 24: 0.0})
    assert next_round(table, seeds, SETTINGS) == {16: 7, 20: 3}


def test_safe_edge_caps_the_measured_starts_after_the_last_unsafe_one_then_bisects():
    seeds = {0: 7, 1: 7, 4: 3, 16: 3, 24: 7}
    table = _table({0: "critical", 1: "undetermined", 4: "undetermined", 16: "undetermined",
                    24: "safe"}, {0: 2.0, 1: 0.8, 4: 0.5, 16: 0.1, 24: 0.0})
    # Critical edge: 1 is capped undetermined and 4's interim mean (exactly the tolerance) is
    # not above it, so 0 | 1 is settled. Safe edge: 4 blocks (its mean is not below the
    # tolerance); 16 is after it and not capped yet.
    assert next_round(table, seeds, SETTINGS) == {16: 7}
    seeds[16] = 7
    table = _table({0: "critical", 1: "undetermined", 4: "undetermined", 16: "safe",
                    24: "safe"}, {0: 2.0, 1: 0.8, 4: 0.5, 16: 0.1, 24: 0.0})
    assert next_round(table, seeds, SETTINGS) == {10: 3}


def test_no_candidate_for_critical_and_an_unsafe_last_start_settle_at_once():
    seeds = {0: 3, 8: 3, 16: 7}
    table = _table({0: "undetermined", 8: "undetermined", 16: "undetermined"},
                   {0: 0.2, 8: 0.1, 16: 0.3})
    assert next_round(table, seeds, SETTINGS) == {}
    assert boundaries(table) == (None, None)


def test_boundaries():
    table = _table({0: "critical", 5: "critical", 10: "undetermined", 15: "safe", 20: "safe"})
    assert boundaries(table) == (5, 15)
    table = _table({0: "critical", 5: "safe", 10: "critical"})
    assert boundaries(table) == (10, None)


def test_adaptive_end_to_end_reuses_one_folder(tmp_path):
    outcome, seeds = run_adaptive(["experiment=tiny", "design=adaptive", "design.length=3",
                                   "design.initial_step=2", "design.seeds_initial=2",
                                   "design.seeds_max=3", "tolerance=5",
                                   f"results_dir={tmp_path}"])
    assert any(n.startswith("round 1:") for n in outcome.notes)
    assert any("latest critical start" in n for n in outcome.notes)
    assert set(outcome.table.start) == set(seeds)
    assert all(2 <= n <= 3 for n in seeds.values())
    assert (tmp_path / "tiny" / "ledger.sqlite").is_file()


def test_adaptive_needs_a_tolerance(tmp_path):
    with pytest.raises(ConfigError, match="tolerance"):
        run_adaptive(["experiment=tiny", "design=adaptive", "design.length=3", "tolerance=null",
                      f"results_dir={tmp_path}"])


def test_adaptive_reuses_the_grid_runs_and_is_never_bolder(tmp_path):
    # A grid of every start at the seed cap, then the adaptive design in the same folder: it
    # must train nothing new (its runs are the grid's runs: exact branching), and at every start
    # it confirmed, its verdict is the grid's or more cautious (Holm padded to the grid family).
    common = ["experiment=tiny", "tolerance=0.5", f"results_dir={tmp_path}", "name=edge"]
    grid = run_sweep([*common, "design.starts=[0,1,2,3,4]", "seeds=3"], quiet=True)
    before = _segments(tmp_path / "edge")
    outcome, seeds = run_adaptive([*common, "design=adaptive", "design.length=3",
                                   "design.initial_step=2", "design.first_start=0",
                                   "design.last_start=4", "design.seeds_initial=2",
                                   "design.seeds_max=3"])
    assert _segments(tmp_path / "edge") == before
    grid_verdict = dict(zip(grid.table.start, grid.table.verdict, strict=True))
    for row in outcome.table.itertuples():
        if row.confirmed:
            assert row.seeds == 3
            assert row.verdict in (grid_verdict[row.start], "undetermined")
        else:
            assert row.verdict == "undetermined" and row.seeds == 2


def _segments(folder) -> int:
    import sqlite3

    with sqlite3.connect(folder / "ledger.sqlite") as con:
        return con.execute("select count(*) from segments where status = 'done'").fetchone()[0]


def test_a_finished_adaptive_folder_reads_by_the_adaptive_rule(tmp_path):
    # A grid at the cap in the same folder, then the adaptive design: load_sweep, plan and the
    # table must describe the adaptive design's runs only (its starts at their seed counts),
    # with verdicts at the cap and Holm over the whole candidate grid, as run_adaptive did.
    common = ["experiment=tiny", "tolerance=0.5", f"results_dir={tmp_path}", "name=edge"]
    run_sweep([*common, "design.starts=[0,1,2,3,4]", "seeds=3"], quiet=True)
    outcome, seeds = run_adaptive([*common, "design=adaptive", "design.length=3",
                                   "design.initial_step=2", "design.first_start=0",
                                   "design.last_start=4", "design.seeds_initial=2",
                                   "design.seeds_max=3"])
    with load_sweep(tmp_path / "edge") as view:
        assert view.design.kind == "adaptive" and view.design.seeds_per_start == seeds
        windows = view.runs[view.runs.is_baseline == 0]
        assert windows.groupby("start_epoch").size().to_dict() == seeds
        table = view.table()
        pd.testing.assert_series_equal(table.verdict, outcome.table.verdict)
        pd.testing.assert_series_equal(table.p_holm, outcome.table.p_holm)
        answer = view.plan()
    notes = " ".join(plan_notes(answer))
    assert "all 5 candidate starts of the design's grid" in notes
    screened = [s for s, n in seeds.items() if n < 3]
    assert (SCREENED in [f.code for f in answer.facts]) == bool(screened)
    assert [s.start for s in answer.starts if not s.confirmed] == sorted(screened)


def test_dry_run_shows_the_first_round_with_its_own_seeds(tmp_path, capsys):
    from periodscan.cli import main

    args = ["sweep", "experiment=tiny", "design=adaptive", "design.length=3",
            "design.initial_step=2", "design.seeds_initial=2", "design.seeds_max=3",
            "seeds=5", f"results_dir={tmp_path}", "--dry-run"]
    assert main(args) == 0
    out = capsys.readouterr().out
    assert "first round" in out and "over 2 seeds" in out  # seeds_initial, not the root seeds
    assert not (tmp_path / "tiny").exists()
