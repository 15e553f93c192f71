"""What the reading verbs print: plan and status JSON, the table footer, chance-level runs."""

from __future__ import annotations

import json
import shutil
import sqlite3
from datetime import datetime

import pytest
from test_api import build_tiny_sweep

from periodscan.analysis.stats import SETTLE_CAP
from periodscan.api import load_sweep
from periodscan.cli import main


@pytest.fixture(scope="module")
def sweep_folder(tmp_path_factory):
    return build_tiny_sweep(tmp_path_factory.getbasetemp() / "shared_sweep")


@pytest.fixture
def copy(sweep_folder, tmp_path):
    target = tmp_path / "tiny"
    shutil.copytree(sweep_folder, target)
    return target


def test_plan_json_more_seeds_is_a_number_or_null_with_words(sweep_folder, capsys):
    with load_sweep(sweep_folder) as view:
        table = view.table(with_mcnemar=False)
    row = table[table.length == 3].sort_values("damage").iloc[-1]
    assert row.damage > 0
    # A tolerance exactly at a start's mean damage: that start can never be settled.
    tolerance = repr(float(row.damage))
    capsys.readouterr()
    assert main(["plan", str(sweep_folder), "--length", "3", "--tolerance", tolerance,
                 "--json"]) == 0
    starts = {s["start"]: s for s in json.loads(capsys.readouterr().out)["starts"]}
    stuck = starts[int(row.start)]
    assert stuck["verdict"] == "undetermined" and stuck["more_seeds"] is None
    assert stuck["more_seeds_text"] == f"more than {SETTLE_CAP} seeds in total"
    for start in starts.values():
        assert start["more_seeds"] is None or isinstance(start["more_seeds"], (int, float))
        if start["verdict"] == "undetermined":
            assert isinstance(start["more_seeds_text"], str)


def test_status_json_gives_the_last_update_in_iso_8601(sweep_folder, capsys):
    capsys.readouterr()
    assert main(["status", str(sweep_folder), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    stamp = datetime.fromisoformat(data["last_update"])
    assert stamp.utcoffset().total_seconds() == 0
    with sqlite3.connect(sweep_folder / "ledger.sqlite") as conn:
        last = conn.execute("SELECT max(finished_at) FROM segments").fetchone()[0]
    assert abs(stamp.timestamp() - last) < 1


def test_sweep_prints_each_interval_method_once(tmp_path, capsys):
    args = ["sweep", "experiment=tiny", f"results_dir={tmp_path}", "seeds=2", "-q"]
    assert main(args) == 0
    out = capsys.readouterr().out
    assert "interval method" not in out
    footer = [line for line in out.splitlines() if "intervals:" in line]
    assert len(footer) == 1 and footer[0].endswith("intervals: Student t (3 windows)")
    assert main(["report", str(tmp_path / "tiny")]) == 0
    page = (tmp_path / "tiny" / "report.html").read_text()
    assert "intervals: Student t (3 windows)" in page


def test_a_baseline_that_ended_at_chance_is_flagged(copy, capsys):
    # Seed 2's baseline as if its loss had spiked and it stayed at chance: 31 of its 300 test
    # examples right among 10 classes (one-sided binomial p = 0.45, scipy.stats.binomtest).
    with sqlite3.connect(copy / "ledger.sqlite") as conn:
        conn.execute("UPDATE runs SET test_acc = 31.0 / 300 WHERE is_baseline = 1 AND seed = 2")
        classes = json.loads(conn.execute("SELECT value FROM meta WHERE key = 'num_classes'")
                             .fetchone()[0])
    assert classes == 10
    with load_sweep(copy) as view:
        table = view.table()
    assert (table.baseline_diverged == 1).all() and (table.diverged == 0).all()
    capsys.readouterr()
    assert main(["report", str(copy)]) == 0
    page = (copy / "report.html").read_text()
    assert "1 baseline(s) diverged or at chance level" in page
    assert main(["plan", str(copy), "--length", "3"]) == 0
    assert "diverged or at chance level" in capsys.readouterr().out
