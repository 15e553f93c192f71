"""The adaptive design: refinement logic on hand-made verdicts, and one real tiny run."""

from __future__ import annotations

import pandas as pd
import pytest

from periodscan.adaptive import _coarse, _refine, boundaries, grid_branch_epochs, run_adaptive
from periodscan.errors import ConfigError

SETTINGS = {"resolution": 1, "seeds_initial": 3, "seeds_max": 7, "seeds_step": 2}


def _table(verdicts: dict[int, str]) -> pd.DataFrame:
    return pd.DataFrame({"start": list(verdicts), "verdict": list(verdicts.values())})


def test_coarse_pass_includes_the_last_start():
    assert _coarse(0, 45, 8) == [0, 8, 16, 24, 32, 40, 45]
    assert _coarse(0, 40, 8) == [0, 8, 16, 24, 32, 40]


def test_refine_bisects_where_the_verdict_changes_and_adds_seeds_where_undecided():
    seeds = {0: 3, 8: 3, 16: 3, 24: 3}
    table = _table({0: "critical", 8: "critical", 16: "undetermined", 24: "safe"})
    wanted = _refine(table, seeds, SETTINGS)
    # 16 is undecided -> 2 more seeds; the verdict changes between 8|16 and 16|24 -> midpoints.
    assert wanted == {16: 5, 12: 3, 20: 3}


def test_refine_stops_at_the_resolution_and_the_seed_cap():
    seeds = {4: 7, 5: 3}
    table = _table({4: "undetermined", 5: "safe"})
    assert _refine(table, seeds, SETTINGS) == {}


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
                            "design.seeds_max=3", "design.seeds_step=1", "tolerance=5",
                            f"results_dir={tmp_path}"], quiet=True)
    assert outcome.rounds >= 1
    assert set(outcome.table.start) == set(outcome.seeds_per_start)
    assert all(2 <= n <= 3 for n in outcome.seeds_per_start.values())
    assert (tmp_path / "tiny" / "ledger.sqlite").is_file()


def test_adaptive_needs_a_tolerance(tmp_path):
    with pytest.raises(ConfigError, match="tolerance"):
        run_adaptive(["experiment=tiny", "design=adaptive", "design.length=3", "tolerance=null",
                      f"results_dir={tmp_path}"], quiet=True)
