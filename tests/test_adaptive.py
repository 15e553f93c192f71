"""The adaptive design: refinement logic on hand-made verdicts, and one real tiny run."""

from __future__ import annotations

import pandas as pd
import pytest

from periodscan.adaptive import (
    _coarse,
    _confirm,
    _locate,
    boundaries,
    grid_branch_epochs,
    run_adaptive,
)
from periodscan.errors import ConfigError
from periodscan.sweep import run_sweep

SETTINGS = {"resolution": 1, "seeds_initial": 3, "seeds_max": 7, "tolerance": 0.5}


def _table(verdicts: dict[int, str], damage: dict[int, float] | None = None) -> pd.DataFrame:
    damage = damage or {s: 0.0 for s in verdicts}
    return pd.DataFrame({"start": list(verdicts), "verdict": list(verdicts.values()),
                         "damage": [damage[s] for s in verdicts]})


def test_coarse_pass_includes_the_last_start():
    assert _coarse(0, 45, 8) == [0, 8, 16, 24, 32, 40, 45]
    assert _coarse(0, 40, 8) == [0, 8, 16, 24, 32, 40]


def test_locate_bisects_where_the_mean_crosses_the_tolerance():
    seeds = {0: 3, 8: 3, 16: 3, 24: 3}
    table = _table(dict.fromkeys(seeds, "undetermined"), {0: 2.0, 8: 1.2, 16: 0.1, 24: 0.9})
    # Crossings between 8|16 (above -> below) and 16|24 (below -> above): both midpoints.
    assert _locate(table, seeds, SETTINGS) == {12: 3, 20: 3}
    # At the resolution nothing is left to bisect.
    seeds = {4: 3, 5: 3}
    table = _table(dict.fromkeys(seeds, "undetermined"), {4: 2.0, 5: 0.0})
    assert _locate(table, seeds, SETTINGS) == {}


def test_confirm_raises_the_deciding_starts_to_the_cap_first():
    seeds = {0: 3, 8: 3, 12: 3, 16: 3, 24: 3}
    table = _table(dict.fromkeys(seeds, "undetermined"),
                   {0: 3.0, 8: 2.0, 12: 1.0, 16: 0.2, 24: 0.0})
    # Last start above the tolerance is 12: it and everything after go to the cap; 0 and 8 not.
    assert _confirm(table, seeds, SETTINGS) == {12: 7, 16: 7, 24: 7}


def test_confirm_walks_back_until_a_critical_start_then_bisects_disagreements():
    seeds = {0: 3, 8: 3, 12: 7, 16: 7, 24: 7}
    damage = {0: 3.0, 8: 2.0, 12: 1.0, 16: 0.2, 24: 0.0}
    table = _table({0: "undetermined", 8: "undetermined", 12: "undetermined",
                    16: "undetermined", 24: "safe"}, damage)
    # 12 is not critical at the cap: the start before it is raised.
    assert _confirm(table, seeds, SETTINGS) == {8: 7}
    seeds[8] = 7
    table = _table({0: "undetermined", 8: "critical", 12: "undetermined", 16: "undetermined",
                    24: "safe"}, damage)
    # 8 is critical: midpoints at the cap where confirmed neighbours disagree (8|12, 16|24).
    assert _confirm(table, seeds, SETTINGS) == {10: 7, 20: 7}


def test_confirm_is_done_when_neighbours_are_at_the_resolution():
    seeds = {0: 3, 4: 7, 5: 7}
    table = _table({0: "undetermined", 4: "critical", 5: "safe"}, {0: 3.0, 4: 2.0, 5: 0.0})
    assert _confirm(table, seeds, SETTINGS) == {}


def test_boundaries():
    table = _table({0: "critical", 5: "critical", 10: "undetermined", 15: "safe", 20: "safe"})
    assert boundaries(table) == (5, 15)
    table = _table({0: "critical", 5: "safe", 10: "critical"})
    assert boundaries(table) == (10, None)


def test_grid_branch_epochs():
    # Starts 0, 5, 10 on 20 epochs, 2 seeds: (20 + 15 + 10) x 2.
    assert grid_branch_epochs(20, [0, 5, 10], 2) == 90


def test_adaptive_end_to_end_reuses_one_folder(tmp_path):
    outcome = run_adaptive(["experiment=tiny", "design=adaptive", "design.length=3",
                            "design.initial_step=2", "design.seeds_initial=2",
                            "design.seeds_max=3", "tolerance=5",
                            f"results_dir={tmp_path}"], quiet=True)
    assert outcome.rounds >= 1
    assert set(outcome.table.start) == set(outcome.seeds_per_start)
    assert all(2 <= n <= 3 for n in outcome.seeds_per_start.values())
    assert (tmp_path / "tiny" / "ledger.sqlite").is_file()


def test_adaptive_needs_a_tolerance(tmp_path):
    with pytest.raises(ConfigError, match="tolerance"):
        run_adaptive(["experiment=tiny", "design=adaptive", "design.length=3", "tolerance=null",
                      f"results_dir={tmp_path}"], quiet=True)


def test_adaptive_reuses_the_grid_runs_and_is_never_bolder(tmp_path):
    # A grid of every start at the seed cap, then the adaptive design in the same folder: it
    # must train nothing new (its runs are the grid's runs: exact branching), and at every start
    # it confirmed, its verdict is the grid's or more cautious (Holm padded to the grid family).
    common = ["experiment=tiny", "tolerance=0.5", f"results_dir={tmp_path}", "name=edge"]
    grid = run_sweep([*common, "design.starts=[0,1,2,3,4]", "seeds=3"], quiet=True)
    before = _segments(tmp_path / "edge")
    outcome = run_adaptive([*common, "design=adaptive", "design.length=3",
                            "design.initial_step=2", "design.first_start=0",
                            "design.last_start=4", "design.seeds_initial=2",
                            "design.seeds_max=3"], quiet=True)
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
