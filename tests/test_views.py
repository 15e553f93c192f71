"""Views: shared phrases, the text table, the plan's words and JSON, figures' choices, HTML."""

from __future__ import annotations

import json
import math
from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

from periodscan.analysis import planner
from periodscan.analysis.planner import Fact, plan_from_table
from periodscan.analysis.sensitivity import TableOptions, sensitivity_table
from periodscan.analysis.stats import SETTLE_CAP
from periodscan.designs.layout import REMOVAL, WINDOW
from periodscan.views.figures import curve_groups, pick_windows
from periodscan.views.forecast import sparkline
from periodscan.views.html_results import runs_html, table_html
from periodscan.views.plan import fact_text, format_plan, plan_record
from periodscan.views.tables import format_table, row_notes
from periodscan.views.words import (
    age,
    dataset_name,
    human_duration,
    interval_summary,
    iso_time,
    more_seeds_phrase,
    sweep_title,
)

CONFIGS = Path(__file__).resolve().parents[1] / "configs"


def runs_from_damage(damage: dict, epochs: int = 30, base_acc: float = 0.9) -> pd.DataFrame:
    """A runs frame whose window runs lose exactly the given points against their baseline."""
    rows = []
    seeds = max(len(v) for v in damage.values())
    for seed in range(seeds):
        rows.append((f"b{seed}", seed, 0, 0, 1, base_acc))
        for (start, length), values in damage.items():
            if seed < len(values):
                rows.append((f"w{start}+{length}s{seed}", seed, start, length, 0,
                             base_acc - values[seed] / 100))
    frame = pd.DataFrame(rows, columns=["run_id", "seed", "start_epoch", "length",
                                        "is_baseline", "test_acc"])
    return frame.assign(end_epoch=epochs, status="done", n_test=10_000)


# --- shared phrases ---------------------------------------------------------------------------

@pytest.mark.parametrize("seconds, text", [(0, "0 s"), (89, "89 s"), (90, "1.5 min"),
                                           (5399, "90.0 min"), (5400, "1.5 h"),
                                           (36_000, "10.0 h")])
def test_human_duration(seconds, text):
    assert human_duration(seconds) == text


def test_age_and_iso_time():
    assert age(None) == "never"
    assert age(1_000.0, now=1_180.0) == "3.0 min ago"
    assert age(2_000.0, now=1_000.0) == "0 s ago"  # a clock running behind is not negative
    assert iso_time(0.0) == "1970-01-01T00:00:00+00:00"
    stamp = 1_764_684_191.7
    back = datetime.fromisoformat(iso_time(stamp))
    assert back.utcoffset().total_seconds() == 0 and abs(back.timestamp() - stamp) < 1
    assert iso_time(None) is None and iso_time(math.nan) is None


def _data(option: str, **values) -> dict:
    return {**yaml.safe_load((CONFIGS / "data" / f"{option}.yaml").read_text()), **values}


@pytest.mark.parametrize("data, name", [
    (_data("mnist1d"), "mnist1d"),
    (_data("digits"), "digits"),
    (_data("npz", path="/data/scans/chest_xray.npz"), "chest_xray"),
    (_data("image_folder", root="/data/leaves/"), "leaves"),
    (_data("torchvision", root="/datasets"), "CIFAR10"),
    ({"_target_": "mylab.datasets.SpectraSet", "n": 3}, "SpectraSet"),
])
def test_dataset_name_is_the_data_sets_not_the_loaders(data, name):
    assert dataset_name(data) == name


def test_sweep_title():
    config = yaml.safe_load((CONFIGS / "config.yaml").read_text())
    config.update(data=_data("mnist1d"), deficit={"_target_": "periodscan.deficits.Blur"},
                  model={"_target_": "periodscan.models.CNN1d"})
    assert sweep_title(config) == "Blur on mnist1d / CNN1d, sweep 'demo'"
    assert "load_" not in sweep_title(config)


def test_more_seeds_phrase():
    assert more_seeds_phrase(3.0) == "about 3 more seeds"
    assert more_seeds_phrase(1.0) == "about 1 more seed"
    assert more_seeds_phrase(math.inf) == f"more than {SETTLE_CAP} seeds in total"
    assert more_seeds_phrase(math.nan).startswith("unknown")


# --- the table as text and HTML ---------------------------------------------------------------

def mixed_table() -> pd.DataFrame:
    """Five windows of one length: two with 10 seeds (bootstrap), two with 4 (t), one with a
    zero spread (t with the sd floor) and one with a single seed (no interval)."""
    rng = np.random.default_rng(3)
    damage = {(0, 5): list(rng.normal(3, 1, 10)), (5, 5): list(rng.normal(0, 1, 10)),
              (10, 5): [1.0, 0.2, 0.7, 1.4], (15, 5): [0.1, -0.3, 0.2, 0.0],
              (20, 5): [0.5, 0.5, 0.5], (25, 5): [0.4]}
    return sensitivity_table(runs_from_damage(damage), 30, TableOptions(tolerance=0.5))


def test_interval_footer_names_each_method_once():
    table = mixed_table()
    assert sorted(table.interval) == ["BCa bootstrap", "BCa bootstrap", "t", "t", "t",
                                      "t, sd floor"]
    summary = interval_summary(table)
    assert summary == ("intervals: Student t (3 windows), BCa bootstrap (2 windows), "
                       "none (1 window with fewer than 2 seeds); sd floor applied to 1")
    text = format_table(table)
    footer, established = text.splitlines()[-2:]  # the bound follows: windows are open
    assert footer.endswith(summary) and "interval method" not in text
    assert established.startswith("established: a 5-epoch deficit does less than")
    assert "Holm-corrected over the windows of each length" in footer
    html = table_html(table, WINDOW, 30)
    assert summary in html and "t, t" not in html


def test_table_labels_follow_the_layout():
    damage = {(0, n): [2.0 - n / 10, 2.1 - n / 10, 1.9 - n / 10] for n in (5, 10, 20)}
    table = sensitivity_table(runs_from_damage(damage), 30,
                              TableOptions(tolerance=0.5, family="all"))
    removal = format_table(table, REMOVAL)
    assert "until 5" in removal and "until 20" in removal and "[0, 5)" not in removal
    assert "Holm-corrected over every window of the design" in removal
    assert "[0, 5)" in format_table(table, WINDOW)
    html = table_html(table, REMOVAL, 30)
    assert "until 20" in html and "<th>until</th>" in html and "20 (67%)" in html
    assert [label for label, _ in curve_groups(table, REMOVAL)] == ["deficit from epoch 0"]
    assert len(curve_groups(table, WINDOW)) == 3
    assert pick_windows(table, layout=REMOVAL)[-1] == (0, 20)  # the latest end is shown


def test_notes_say_diverged_or_at_chance():
    row = pd.Series({"verdict": "critical", "seeds": 3, "damage_low": 1.0,
                     "short_recovery": False, "recovery_epochs": 10, "diverged": 1,
                     "baseline_diverged": 2, "failed": 0, "unfinished": 0, "no_baseline": 0})
    notes = row_notes(next(pd.DataFrame([row]).itertuples()))
    assert notes == ["1 diverged or at chance level (counted)",
                     "2 baseline(s) diverged or at chance level"]
    table = mixed_table().assign(diverged=[1, 0, 0, 0, 0, 0], baseline_diverged=0)
    status = type("Status", (), {"runs_by_status": {"done": 40}, "runs_done": 40,
                                 "runs_total": 40, "epochs_done": 1, "epochs_total": 1,
                                 "failures": []})()
    assert "1 window run(s) diverged or at chance level" in runs_html(status, table)


# --- the plan ---------------------------------------------------------------------------------

def _answer(tolerance: float = 0.5):
    damage = {(0, 5): [4.1, 3.6, 4.8, 3.9, 4.3], (10, 5): [0.9, -0.4, 2.3, 0.1, 1.6],
              (20, 5): [0.0, 0.1, -0.1, 0.05, 0.0]}
    table = sensitivity_table(runs_from_damage(damage), 30, TableOptions(tolerance=tolerance))
    return plan_from_table(table, 5, 30, sweep="fixed")


def test_plan_json_gives_numbers_or_null_and_words_apart():
    record = plan_record(_answer())
    by_start = {s["start"]: s for s in record["starts"]}
    assert by_start[0]["verdict"] == "critical" and by_start[0]["more_seeds"] is None
    assert by_start[0]["more_seeds_text"] is None
    open_start = by_start[10]
    assert open_start["verdict"] == "undetermined"
    assert isinstance(open_start["more_seeds"], (int, float)) and open_start["more_seeds"] >= 1
    assert open_start["more_seeds_text"] == more_seeds_phrase(open_start["more_seeds"])
    # A mean exactly on the tolerance can never be settled: null plus the words.
    answer = _answer(tolerance=float(np.mean([0.9, -0.4, 2.3, 0.1, 1.6])))
    settled = {s["start"]: s for s in plan_record(answer)["starts"]}[10]
    assert settled["more_seeds"] is None
    assert settled["more_seeds_text"] == f"more than {SETTLE_CAP} seeds in total"
    assert all(isinstance(f["code"], str) for f in record["facts"])
    json.dumps(record, allow_nan=False)  # strict JSON: no NaN or Infinity tokens


@pytest.mark.parametrize("fact", [
    Fact(planner.LENGTH_SUBSTITUTED, starts=(20,)), Fact(planner.SHORT_RECOVERY, starts=(20,)),
    Fact(planner.PRODUCTION_MAPPING), Fact(planner.FIXED_RECOVERY, count=6),
    Fact(planner.RUNS_LOST, count=2), Fact(planner.RUNS_DIVERGED, count=1),
    Fact(planner.BASELINES_DIVERGED, starts=(4,)),
    Fact(planner.SCREENED, starts=(8, 16)), Fact(planner.UNDETERMINED, count=1, seeds=math.inf),
    Fact(planner.METHOD), Fact(planner.METHOD, count=12), Fact(planner.PROXY)])
def test_every_plan_fact_has_words(fact):
    answer = plan_from_table(mixed_table(), 5, 30, production_epochs=90)
    text = fact_text(answer, fact)
    assert text and "{" not in text
    for number in (*fact.starts, *([fact.count] if fact.count else [])):
        assert str(number) in text


def test_plan_text_lists_each_fact():
    answer = _answer()
    text = format_plan(answer)
    assert "critical starts: 0" in text and "safe starts: 20" in text
    assert text.count("note: ") == len(answer.facts)
    assert "evidence, not a guarantee" in text


def test_sparkline_follows_the_curve():
    assert sparkline(np.arange(8)) == "▁▂▃▄▅▆▇█"
    assert sparkline(np.ones(5)) == "▁▁▁▁▁"
    assert len(sparkline(np.arange(500), width=60)) == 60
