"""One end-to-end run of the command line on the tiny preset: sweep, rerun, dry run, help."""

from __future__ import annotations

import sqlite3

import pandas as pd
import pytest

from periodscan.cli import main


def test_sweep_end_to_end(tmp_path, capsys):
    args = ["sweep", "experiment=tiny", f"results_dir={tmp_path}", "-q"]
    assert main(args) == 0
    out = capsys.readouterr().out
    folder = tmp_path / "tiny"
    table = pd.read_csv(folder / "sensitivity.csv")
    # tiny: starts 0, 2, 4 x length 3, 2 seeds.
    assert list(table.start) == [0, 2, 4] and set(table.seeds) == {2}
    assert {"damage", "damage_low", "damage_high", "baseline_acc"} <= set(table.columns)
    assert (folder / "sensitivity.png").stat().st_size > 10_000
    assert (folder / "config.yaml").is_file()
    assert "window" in out and "results:" in out

    with sqlite3.connect(folder / "ledger.sqlite") as conn:
        before = conn.execute("SELECT segment_id, finished_at FROM segments").fetchall()
        statuses = {s for (s,) in conn.execute("SELECT status FROM runs")}
    assert statuses == {"done"}

    # Rerunning the same command trains nothing and gives the same table.
    assert main(args) == 0
    with sqlite3.connect(folder / "ledger.sqlite") as conn:
        after = conn.execute("SELECT segment_id, finished_at FROM segments").fetchall()
    assert sorted(after) == sorted(before)
    pd.testing.assert_frame_equal(pd.read_csv(folder / "sensitivity.csv"), table)


def test_dry_run_trains_nothing(tmp_path, capsys):
    assert main(["sweep", "experiment=tiny", f"results_dir={tmp_path}", "--dry-run"]) == 0
    out = capsys.readouterr().out
    assert "with sharing" in out and "estimated wall time" in out
    assert not (tmp_path / "tiny").exists()


def test_bad_override_is_one_line_exit_2(tmp_path, capsys):
    assert main(["sweep", "deficit=nope", f"results_dir={tmp_path}"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "deficit" in err and "blur" in err


@pytest.mark.parametrize("argv", [["--help"], ["sweep", "--help"]])
def test_help(argv, capsys):
    with pytest.raises(SystemExit) as info:
        main(argv)
    assert info.value.code == 0
    assert "deficit" in capsys.readouterr().out
