"""periodscan compare: the statistics against scipy and statsmodels, the edges, and the verb end
to end on a 3-rung width ladder of the tiny preset (plus a sweep whose baselines are the same
runs as the first rung's, to exercise the paired case)."""

from __future__ import annotations

import json
import shutil
import sqlite3

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.weightstats import CompareMeans, DescrStatsW

from periodscan.analysis.compare import (
    BASELINES_DIFFER,
    PAIRED,
    WELCH,
    backed,
    compare_sweeps,
    edges_frame,
    located,
    paired_difference,
    welch_difference,
)
from periodscan.analysis.sensitivity import paired_damage
from periodscan.api import load_sweep
from periodscan.cli import main
from periodscan.designs.adaptive_search import boundaries


# --- statistics -------------------------------------------------------------------------------
@pytest.mark.parametrize("n, confidence", [(3, 0.95), (7, 0.9), (12, 0.99)])
def test_paired_difference_matches_scipy_ttest_rel(n, confidence):
    rng = np.random.default_rng(n)
    a = rng.normal(2.0, 1.0, n)
    b = a + rng.normal(0.7, 0.5, n)
    got = paired_difference(a, b, confidence)
    ref = stats.ttest_rel(b, a)  # scipy.stats.ttest_rel: paired t test of b - a
    ci = ref.confidence_interval(confidence_level=confidence)
    assert got.mean == pytest.approx(np.mean(b - a), rel=1e-12)
    assert (got.low, got.high) == pytest.approx((ci.low, ci.high), rel=1e-10)
    assert got.pvalue == pytest.approx(ref.pvalue, rel=1e-10)
    assert got.df == ref.df == n - 1
    assert got.method == "paired t"


@pytest.mark.parametrize("na, nb, confidence", [(3, 5, 0.95), (10, 4, 0.9), (6, 6, 0.99)])
def test_welch_difference_matches_scipy_and_statsmodels(na, nb, confidence):
    rng = np.random.default_rng(na * 100 + nb)
    a = rng.normal(1.0, 0.4, na)
    b = rng.normal(2.5, 2.0, nb)
    got = welch_difference(a, b, confidence)
    ref = stats.ttest_ind(b, a, equal_var=False)  # scipy.stats.ttest_ind, Welch's t test
    ci = ref.confidence_interval(confidence_level=confidence)
    assert got.mean == pytest.approx(b.mean() - a.mean(), rel=1e-12)
    assert (got.low, got.high) == pytest.approx((ci.low, ci.high), rel=1e-10)
    assert got.pvalue == pytest.approx(ref.pvalue, rel=1e-10)
    assert got.df == pytest.approx(ref.df, rel=1e-12)
    # statsmodels CompareMeans with usevar="unequal" (Welch-Satterthwaite), a second reference
    low, high = CompareMeans(DescrStatsW(b), DescrStatsW(a)).tconfint_diff(
        alpha=1 - confidence, usevar="unequal")
    assert (got.low, got.high) == pytest.approx((low, high), rel=1e-10)


def test_zero_spread_uses_the_floor_and_too_few_seeds_give_no_interval():
    same = welch_difference([1.0, 1.0, 1.0], [2.0, 2.0, 2.0], 0.95, sd_floor=0.5)
    # with both variances floored to 0.25, Welch equals Student's pooled t on 2 * 3 - 2 = 4 df
    half = stats.t.ppf(0.975, 4) * np.sqrt(0.25 / 3 + 0.25 / 3)
    assert (same.low, same.high) == pytest.approx((1.0 - half, 1.0 + half), rel=1e-12)
    assert same.method == "welch, sd floor"
    paired = paired_difference([1.0, 2.0, 3.0], [1.5, 2.5, 3.5], 0.95, sd_floor=0.5)
    assert paired.method == "paired t, sd floor" and paired.low < 0.5 < paired.high
    one = welch_difference([1.0], [2.0, 3.0])
    assert one.mean == pytest.approx(1.5) and np.isnan(one.low) and np.isnan(one.pvalue)


# --- edges ------------------------------------------------------------------------------------
def _curves(verdicts: dict[str, list[str]], starts=(0, 10, 20, 30)) -> pd.DataFrame:
    rows = [{"sweep": sweep, "start": s, "length": 15, "x": s, "seeds": 3, "verdict": v}
            for sweep, marks in verdicts.items() for s, v in zip(starts, marks, strict=True)]
    return pd.DataFrame(rows)


def test_edges_follow_boundaries_and_say_when_they_move():
    curves = _curves({"a": ["critical", "critical", "safe", "safe"],
                      "b": ["critical", "critical", "critical", "safe"]})
    edges, moves = edges_frame(curves, [15])
    assert list(edges.critical_until) == [10, 20] and list(edges.safe_from) == [20, 30]
    assert edges.located.all()
    for sweep, group in curves.groupby("sweep"):  # the adaptive design's own reading
        assert boundaries(group) == tuple(edges[edges.sweep == sweep].iloc[0][
            ["critical_until", "safe_from"]])
    assert moves.moves.item() and moves.critical_until_moves.item()
    still = _curves({"a": ["critical", "undetermined", "safe", "safe"],
                     "b": ["critical", "critical", "safe", "safe"]})
    edges, moves = edges_frame(still, [15])
    assert list(edges.critical_until) == [0, 10] and list(edges.safe_from) == [20, 20]
    assert list(edges.located) == [False, True]  # a's start 10 is undetermined
    assert moves.critical_until_moves.item() and not moves.safe_from_moves.item()


def test_edges_use_only_starts_every_sweep_measured():
    curves = _curves({"a": ["critical", "critical", "safe", "safe"],
                      "b": ["critical", "critical", "safe", "critical"]})
    curves.loc[(curves.sweep == "a") & (curves.start == 30), "seeds"] = 0  # a lacks start 30
    edges, moves = edges_frame(curves, [15])
    assert moves.starts.item() == [0, 10, 20]
    assert list(edges.safe_from) == [20, 20] and not moves.moves.item()
    none = _curves({"a": ["undetermined"] * 4, "b": ["safe"] * 4})
    edges, _ = edges_frame(none, [15])
    assert edges.critical_until.tolist() == [None, None]
    assert edges.safe_from.tolist() == [None, 0]


def test_located_needs_the_edge_between_neighbouring_starts():
    starts = [0, 10, 20, 30]
    assert located(starts, 10, 20) and located(starts, None, 0) and located(starts, 30, None)
    assert not located(starts, 0, 20) and not located(starts, None, None)
    assert not located(starts, None, 10) and not located([], None, None)


def test_a_move_is_backed_only_by_a_damage_difference_near_the_edge():
    edges = pd.DataFrame({"critical_until": [10, 20], "safe_from": [20, 30]}, dtype=object)
    change = {"start": 20, "verdict_against": "safe", "verdict": "critical"}
    assert backed(edges, pd.DataFrame([{**change, "differs": True}]))
    assert not backed(edges, pd.DataFrame([{**change, "differs": False}]))
    far = pd.DataFrame([{**change, "start": 0, "differs": True}])  # outside [10, 30]
    assert not backed(edges, far)
    nothing = pd.DataFrame({"critical_until": [None], "safe_from": [None]}, dtype=object)
    assert not backed(nothing, pd.DataFrame([{**change, "differs": True}]))


# --- end to end on the tiny preset ------------------------------------------------------------
LADDER = ("w8", "w16", "w32")


@pytest.fixture(scope="module")
def ladder(tmp_path_factory):
    """Three widths of the tiny preset, and w8 again with a milder blur (same baselines)."""
    root = tmp_path_factory.mktemp("ladder")
    for name in LADDER:
        args = ["sweep", "experiment=tiny", f"model.channels={name[1:]}", f"name={name}",
                f"results_dir={root}", "-q"]
        assert main(args) == 0
    assert main(["sweep", "experiment=tiny", "model.channels=8", "deficit.sigma=1.0",
                 "name=w8mild", f"results_dir={root}", "-q"]) == 0
    return root


def _damages(folder) -> pd.DataFrame:
    with load_sweep(folder) as view:
        return paired_damage(view.runs)


def _at(damages: pd.DataFrame, start: int) -> np.ndarray:
    return damages[damages.start_epoch == start].damage.to_numpy()


def test_width_ladder_is_compared_with_welch(ladder):
    views = [load_sweep(ladder / name) for name in LADDER]
    c = compare_sweeps(views, tolerance=1.0)
    assert [p.method for p in c.pairings] == [WELCH, WELCH]
    assert c.pairings[0].keys == ["model.channels"]
    assert c.rungs[2].changes == {"model.channels": [8, 32]}
    assert len(c.differences) == 2 * 3  # two pairs x three shared windows
    a, b = _damages(ladder / "w16"), _damages(ladder / "w32")
    row = c.differences[(c.differences.sweep == "w32") & (c.differences.start == 2)].iloc[0]
    ref = stats.ttest_ind(_at(b, 2), _at(a, 2), equal_var=False)  # scipy Welch on the ledgers
    ci = ref.confidence_interval(0.95)
    assert (row.low, row.high) == pytest.approx((ci.low, ci.high), rel=1e-9)
    assert row.against == "w16" and row.p_value == pytest.approx(ref.pvalue, rel=1e-9)
    first = compare_sweeps(views, against="first")
    assert set(first.differences.against) == {"w8"}
    for view in views:
        view.close()


def test_same_baselines_are_paired_by_seed(ladder):
    views = [load_sweep(ladder / "w8"), load_sweep(ladder / "w8mild")]
    c = compare_sweeps(views)
    assert c.pairings[0].method == PAIRED and c.pairings[0].seeds == [0, 1]
    a, b = _damages(ladder / "w8"), _damages(ladder / "w8mild")
    both = a.merge(b, on=["seed", "start_epoch"], suffixes=("_a", "_b"))
    both = both[both.start_epoch == 4].sort_values("seed")
    ref = stats.ttest_rel(both.damage_b, both.damage_a)  # scipy paired t test per seed
    row = c.differences[c.differences.start == 4].iloc[0]
    assert row.difference == pytest.approx(float((both.damage_b - both.damage_a).mean()))
    if np.ptp(both.damage_b - both.damage_a) > 1e-9:  # spread: scipy's interval exactly
        ci = ref.confidence_interval(0.95)
        assert (row.low, row.high) == pytest.approx((ci.low, ci.high), rel=1e-9)
        assert row.method == "paired t" and row.p_value == pytest.approx(ref.pvalue, rel=1e-9)
    else:  # every seed moved by the same amount: the floor of one test example stands in
        assert row.method == "paired t, sd floor"
    for view in views:
        view.close()


def test_baselines_whose_results_differ_are_not_paired(ladder, tmp_path):
    edited = tmp_path / "w8edited"
    shutil.copytree(ladder / "w8mild", edited)
    with sqlite3.connect(edited / "ledger.sqlite") as conn:  # one baseline scored differently
        conn.execute("UPDATE runs SET test_acc = test_acc - 0.01 "
                     "WHERE run_id = 'seed0-baseline-to8'")
    views = [load_sweep(ladder / "w8"), load_sweep(edited)]
    c = compare_sweeps(views)
    assert (c.pairings[0].method, c.pairings[0].reason) == (WELCH, BASELINES_DIFFER)
    assert set(c.differences.method) <= {"welch", "welch, sd floor"}
    for view in views:
        view.close()


def test_compare_verb_prints_text_json_and_writes_the_figure(ladder, capsys):
    folders = [str(ladder / name) for name in LADDER]
    figure = ladder / "out" / "ladder.png"
    assert main(["compare", *folders, "--tolerance", "1", "--figure", str(figure)]) == 0
    text = " ".join(capsys.readouterr().out.split())  # long lines are wrapped
    for words in ("comparing 3 sweeps", "model.channels 8 -> 16", "edge of the critical window",
                  "pairing: w16 vs w8: Welch's t", "evidence, not proof", "confirm on the real "
                  "pipeline", f"figure: {figure}"):
        assert words in text
    assert figure.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert main(["compare", *folders, "--json", "--no-figure", "--against", "first"]) == 0
    record = json.loads(capsys.readouterr().out)
    assert [s["label"] for s in record["sweeps"]] == list(LADDER)
    assert {d["against"] for d in record["differences"]} == {"w8"}
    assert record["figure"] is None and "evidence, not proof" in record["caution"]
    assert len(record["edges"]) == 3 and isinstance(record["edge_moves"][0]["moves"], bool)
    assert isinstance(record["edge_moves"][0]["backed"], bool)
    verdict = {(r["sweep"], r["start"]): r["verdict"] for r in record["curves"]}
    expected = [(d["sweep"], d["start"]) for d in record["differences"]
                if verdict[d["sweep"], d["start"]] != verdict[d["against"], d["start"]]]
    assert [(v["sweep"], v["start"]) for v in record["verdict_changes"]] == expected
    assert main(["compare", "w8", "w16", "--results-dir", str(ladder), "--no-figure"]) == 0
    default = ladder / "compare-w8-w16.png"
    assert main(["compare", "w8", "w16", "--results-dir", str(ladder)]) == 0
    assert default.is_file()


@pytest.mark.parametrize("extra, words", [
    (["w8"], "at least two sweep folders"),
    (["w8", "w8"], "different sweep folders"),
    (["w8", "w16", "--length", "5"], "The 'length' parameter must be a deficit length"),
    (["w8", "w16", "--confidence", "1.5"], "The 'confidence' parameter"),
])
def test_compare_refuses_bad_requests_in_one_line(ladder, capsys, extra, words):
    assert main(["compare", *extra, "--results-dir", str(ladder), "--no-figure"]) == 2
    err = capsys.readouterr().err
    assert words in err and err.count("\n") == 1


def test_compare_refuses_designs_without_window_curves(ladder, capsys):
    assert main(["sweep", "experiment=tiny", "design=removal", "design.until=[2,4]", "seeds=1",
                 "name=removal", f"results_dir={ladder}", "-q"]) == 0
    capsys.readouterr()
    assert main(["compare", "w8", "removal", "--results-dir", str(ladder), "--no-figure"]) == 2
    err = capsys.readouterr().err
    assert "compare reads sweeps of deficit windows" in err and "'removal'" in err
