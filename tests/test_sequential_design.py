"""The sequential design: staged verdicts against fixed-sample Holm, and real tiny sweeps."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from periodscan.analysis import planner
from periodscan.analysis.sequential import Stages
from periodscan.analysis.staged_verdicts import (
    AT_CAP,
    DECIDED,
    StagedRule,
    add_staged_verdicts,
)
from periodscan.analysis.verdicts import add_verdicts
from periodscan.api import load_sweep
from periodscan.designs.sequential import seed_order
from periodscan.errors import ConfigError
from periodscan.jobs.prepare import prepare
from periodscan.jobs.sweep import run_sweep
from periodscan.views.answers import answer_text
from periodscan.views.plan import fact_text, format_plan
from periodscan.views.tables import format_table
from periodscan.views.variants import format_variant_plan, severity_lines

SEQUENTIAL = {"kind": "sequential", "length": 3, "resolution": 1, "initial_step": 2,
              "first_start": 0, "last_start": 4, "stages": [2, 3, 4],
              "spending": "obrien_fleming", "futility": 0.0, "max_rounds": 30,
              "severity": None, "deficits": None}


def _windows(damages: dict[int, np.ndarray]) -> tuple[pd.DataFrame, dict]:
    table = pd.DataFrame({"start": list(damages), "length": 3,
                          "seeds": [len(v) for v in damages.values()],
                          "damage": [float(np.mean(v)) for v in damages.values()]})
    series = {("", s): pd.Series(v, index=range(len(v))) for s, v in damages.items()}
    return table, series


@pytest.mark.parametrize("family_size", [None, 9])
def test_one_stage_gives_the_fixed_sample_holm_verdicts(family_size):
    # With a single look the spending function spends all of alpha there: the group-sequential
    # Holm procedure must reduce to ordinary Holm on the t tests (statsmodels-checked in
    # test_stats), verdict for verdict.
    rng = np.random.default_rng(3)
    damages = {s: rng.normal(mu, 0.6, 10) for s, mu in
               zip(range(0, 40, 5), [3.0, 1.4, 0.9, 0.6, 0.1, 0.0, -0.2, 0.3], strict=True)}
    table, series = _windows(damages)
    rule = StagedRule(stages=Stages((10,)), tolerance=0.5, family_size=family_size)
    staged = add_staged_verdicts(table, series, rule)
    fixed = add_verdicts(table, {(s, 3): v for s, v in damages.items()}, 0.5,
                         family_size=family_size)
    assert list(staged.verdict) == list(fixed.verdict)
    assert set(staged.verdict) >= {"critical", "safe"}  # the case decides both ways
    assert (staged.stopped[staged.verdict != "undetermined"] == DECIDED).all()
    assert (staged.stopped[staged.verdict == "undetermined"] == AT_CAP).all()


def test_a_clear_window_is_decided_at_an_early_stage_and_the_verdict_stays():
    rng = np.random.default_rng(0)
    clear = rng.normal(6.0, 0.3, 16)
    table, series = _windows({0: clear[:8]})
    rule = StagedRule(stages=Stages((3, 5, 8, 12, 16)), tolerance=0.5)
    first = add_staged_verdicts(table, series, rule)
    assert first.verdict.iloc[0] == "critical" and first.stopped.iloc[0] == DECIDED
    # more seeds (as if the design had not stopped) cannot undo a decision taken at a look
    table, series = _windows({0: clear})
    assert add_staged_verdicts(table, series, rule).verdict.iloc[0] == "critical"


def _run(make_config, **changes):
    cfg = make_config(design=dict(SEQUENTIAL), seeds=4, **changes)
    outcome = run_sweep(cfg, quiet=True)
    return cfg, outcome


def test_tiny_sweep_runs_rounds_and_rereads_the_same_table(make_config):
    cfg, outcome = _run(make_config)
    table = outcome.table
    assert set(table.start) <= {0, 1, 2, 3, 4} and {0, 2, 4} <= set(table.start)
    assert set(table.seeds) <= {2, 3, 4}
    assert "stopped" in table and table.stopped.isin(["decided", "futile", "at cap"]).all()
    again = run_sweep(cfg, quiet=True)  # nothing left to train: same rounds, same table
    pd.testing.assert_frame_equal(again.table, table)
    with load_sweep(outcome.folder) as view:
        plan = view.plan(3)
        reread = view.table(with_mcnemar=False)
    assert list(reread.verdict) == list(table.verdict)
    codes = [f.code for f in plan.facts]
    assert planner.SEQUENTIAL in codes and planner.METHOD not in codes
    assert plan.established is None
    grid = list(range(0, 5))
    assert sorted(plan.critical_starts + plan.safe_starts + plan.undetermined_starts) == grid


def test_the_bisection_shares_are_named_in_the_plan_and_the_table(make_config):
    # the same tiny sweep with the first pass's starts holding alpha: a sweep without the field
    # (made before it existed, as SEQUENTIAL here) reads back with Holm's even shares
    cfg = make_config(design=dict(SEQUENTIAL, alpha_passing="bisection"), seeds=4)
    outcome = run_sweep(cfg, quiet=True)
    with load_sweep(outcome.folder) as view:
        plan = view.plan(3)
        assert view.design.passing == "bisection"
        footer = format_table(view.table(with_mcnemar=False), view.design.layout)
    fact = next(f for f in plan.facts if f.code == planner.SEQUENTIAL)
    assert fact.starts == (0, 2, 4)  # the first pass: every initial_step=2 from 0 to 4
    assert "first pass's starts (0, 2, 4) hold it in equal parts" in fact_text(plan, fact)
    assert "alpha held by the first pass's starts" in footer and "Holm" not in footer
    assert "bounds at level" in format_plan(plan) and "Holm" not in format_plan(plan)
    with load_sweep(_run(make_config)[1].folder) as view:
        assert view.design.passing == "even"
        even = next(f for f in view.plan(3).facts if f.code == planner.SEQUENTIAL)
        assert even.starts == () and "Holm's correction" in fact_text(view.plan(3), even)


def test_severity_levels_are_bisected_per_start(make_config):
    design = dict(SEQUENTIAL, severity={"param": "sigma", "levels": [0.5, 1.0, 2.0, 4.0]},
                  first_start=0, last_start=4, initial_step=4, resolution=4)
    cfg = make_config(design=design, seeds=3)
    cfg["design"]["stages"] = [2, 3]
    outcome = run_sweep(cfg, quiet=True)
    table = outcome.table
    assert set(table.start) == {0, 4}
    for _, rows in table.groupby("start"):
        # every start at its mildest and most severe level (the middle ones only where the
        # search saw them differ: tests/test_staged_search.py), one run per seed and level
        assert {0.5, 4.0} <= set(rows.severity)
        assert rows.severity.is_unique
    with load_sweep(outcome.folder) as view:
        plan = view.plan(3)
    assert {"sigma=0.5", "sigma=4"} <= set(plan.answers)
    for answer in plan.answers.values():
        assert planner.SEQUENTIAL in [f.code for f in answer.facts]
        assert sorted(answer.critical_starts + answer.safe_starts
                      + answer.undetermined_starts) == [0, 4]


def test_middle_first_starts_each_start_at_its_middle_level(make_config):
    # design.level_search=middle: the first pass trains the middle level only (sigma 2 of 1,
    # 2, 4), and every later level at a start lies on the side its measured levels leave open
    design = dict(SEQUENTIAL, severity={"param": "sigma", "levels": [1.0, 2.0, 4.0]},
                  first_start=0, last_start=4, initial_step=4, resolution=4,
                  level_search="middle", alpha_passing="bisection")
    cfg = make_config(design=design, seeds=3)
    cfg["design"]["stages"] = [2, 3]
    prepared = prepare(cfg)
    assert {(r.start, r.variant) for r in prepared.design.preview() if r.length} \
        == {(0, "sigma=2"), (4, "sigma=2")}
    outcome = run_sweep(cfg, quiet=True)
    for _, rows in outcome.table.groupby("start"):
        assert 2.0 in set(rows.severity) and len(rows) <= 3 and rows.severity.is_unique
    # the bisection's shares hold at the level measured at every start; the others use Holm
    with load_sweep(outcome.folder) as view:
        plan = view.plan(3)
        footer = format_table(view.table(with_mcnemar=False), view.design.layout)
    assert "along the bisection at level sigma=2, measured first" in footer
    assert "Holm at the other levels" in footer
    coarse = {key: next(f for f in answer.facts if f.code == planner.SEQUENTIAL).starts
              for key, answer in plan.answers.items()}
    assert coarse == {"sigma=1": (), "sigma=2": (0, 4), "sigma=4": ()}
    text = format_variant_plan(plan)
    assert "alpha is shared over the starts of one length and one level" in text
    assert "Holm's correction runs over the starts of one length" not in text


def test_a_variant_without_a_graph_is_judged_by_holm():
    # StagedRule.variant_graphs: a variant mapped to None must get exactly the Holm verdicts
    # (the path checked against fixed-sample Holm above), whatever graph the others use
    from periodscan.analysis.alpha_graph import AlphaGraph

    rng = np.random.default_rng(5)
    damages = {s: rng.normal(mu, 0.5, 8) for s, mu in
               zip(range(0, 40, 5), [2.5, 1.6, 1.0, 0.7, 0.2, -0.1, -0.3, 0.0], strict=True)}
    table, series = _windows(damages)
    table["variant"] = "a"
    series = {("a", s): v for (_, s), v in series.items()}
    stages, starts = Stages((4, 8)), tuple(range(0, 40, 5))
    holm = add_staged_verdicts(table, series, StagedRule(stages=stages, tolerance=0.5,
                                                         family_size=8))
    graph = AlphaGraph.fixed_order(8)
    mixed = StagedRule(stages=stages, tolerance=0.5, family_size=8, graph=graph,
                       family=starts, variant_graphs=(("a", None),))
    ordered = StagedRule(stages=stages, tolerance=0.5, family_size=8, graph=graph,
                         family=starts)
    assert list(add_staged_verdicts(table, series, mixed).verdict) == list(holm.verdict)
    assert list(add_staged_verdicts(table, series, ordered).verdict) != list(holm.verdict)


@pytest.mark.parametrize(("change", "field"), [
    ({"stages": [5, 3]}, "design.stages"),
    ({"stages": [1, 3]}, "design.stages"),
    ({"spending": "linear"}, "design.spending"),
    ({"futility": 1.5}, "design.futility"),
    ({"deficits": ["blur", "noise"]}, "design.deficits"),
    ({"initial_step": 3, "resolution": 2}, "design.initial_step"),
    ({"alpha_passing": "uneven"}, "design.alpha_passing"),
    ({"level_search": "outside_in"}, "design.level_search"),
])
def test_bad_fields_name_the_field(make_config, change, field):
    cfg = make_config(design=dict(SEQUENTIAL, **change))
    with pytest.raises(ConfigError, match=field.replace(".", r"\.")):
        run_sweep(cfg, quiet=True)


def test_a_confidence_whose_levels_shrink_with_alpha_is_refused(make_config):
    # O'Brien-Fleming-type union levels stop growing with alpha near 0.35 for these stages
    # (tests/test_sequential.py); Holm's steps need them to grow, so 0.6 is refused up front.
    cfg = make_config(design=dict(SEQUENTIAL, stages=[3, 5, 8, 12, 16]), confidence=0.6)
    with pytest.raises(ConfigError, match="confidence"):
        run_sweep(cfg, quiet=True)


def test_open_starts_are_sent_to_fresh_seeds_not_to_more_of_the_same(make_config):
    # tolerance 0 on 2 to 4 seeds: starts stay open (the test needs at least one)
    cfg, outcome = _run(make_config, tolerance=0.0)
    with load_sweep(outcome.folder) as view:
        plan = view.plan(3)
    codes = [f.code for f in plan.facts]
    assert planner.UNDETERMINED not in codes
    fresh = next(f for f in plan.facts if f.code == planner.FRESH_SEEDS)
    assert list(fresh.starts) == plan.undetermined_starts
    assert fresh.count == 4 and fresh.seeds == 4  # seeds 0-3 tested: 4, 5, 6, 7 are fresh
    text = fact_text(plan, fresh)
    assert "'seeds=[4,5,6,7]'" in text and "design=window" in text


def test_seed_order_takes_the_named_seeds_then_the_next_numbers():
    assert seed_order(list(range(10)), 16) == list(range(16))  # seeds=10, cap 16: as before
    assert seed_order(list(range(16, 32)), 16) == list(range(16, 32))
    assert seed_order([0, 7, 11], 5) == [0, 7, 11, 12, 13]
    assert seed_order([9, 3, 5, 1], 3) == [9, 3, 5]  # in the order named


def test_a_named_seed_list_is_the_one_trained_and_tested_in_its_order(make_config):
    # A second look on seeds the first sweep did not use: seeds=[7, 5, 6, 4] must train those
    # seeds only, and each stage's test must rest on the first n of them in that order.
    order = [7, 5, 6, 4]
    cfg = make_config(design=dict(SEQUENTIAL), seeds=order, tolerance=0.0)
    outcome = run_sweep(cfg, quiet=True)
    with load_sweep(outcome.folder) as view:
        runs, plan = view.runs, view.plan(3)
    assert set(runs.seed) <= set(order) and 7 in set(runs.seed)
    base = runs[runs.is_baseline == 1].set_index("seed").test_acc
    for row in outcome.table.itertuples():
        mine = runs[(runs.is_baseline == 0) & (runs.start_epoch == row.start)]
        assert sorted(mine.seed) == sorted(order[:row.seeds])
        damage = [100 * (base[s] - acc) for s, acc in zip(mine.seed, mine.test_acc, strict=True)]
        assert row.damage == pytest.approx(np.mean(damage))
    fresh = next(f for f in plan.facts if f.code == planner.FRESH_SEEDS)
    assert fresh.count == 8  # the first seed after the ones named


# --- answers that rest on implied starts and levels (synthetic runs, no training) -----------

def _clear_damage_runs(design, points: float = 5.0) -> pd.DataFrame:
    """A ledger-shaped runs frame holding every run the design could ask for: each window
    ``points`` below its seed's baseline (plus a little noise), at every start and level."""
    rng = np.random.default_rng(3)
    base = {seed: 0.9 + rng.normal(0, 0.01) for seed in design.order}
    keys = [design.key_of(v) for v in range(design.level_count())]
    row = dict(end_epoch=design.epochs, status="done", n_test=1000)
    rows = [dict(row, run_id=f"b{seed}", seed=seed, start_epoch=0, length=0, is_baseline=1,
                 test_acc=acc, variant="") for seed, acc in base.items()]
    rows += [dict(row, run_id=f"{key}w{start}s{seed}", seed=seed, start_epoch=start,
                  length=design.length, is_baseline=0, variant=key,
                  test_acc=acc - (points + rng.normal(0, 0.05)) / 100)
             for key in keys for start in design.grid() for seed, acc in base.items()]
    return pd.DataFrame(rows)


def _replayed_plan(make_config, design_block):
    """The design run round by round on synthetic runs, and its plan."""
    design = prepare(make_config(design=design_block, seeds=4)).design
    runs = _clear_damage_runs(design)
    for _ in design.rounds(lambda: runs):
        pass
    return design, design.plan(design.runs_used(runs), design.last_table, length=3, sweep="t")


def test_implied_critical_starts_join_the_measured_ones_in_one_critical_window(make_config):
    # Starts 0, 2, 4 measured and decided critical imply 1 and 3; the critical window is
    # grouped over the grid (it was grouped over measured starts only and failed to render).
    design, plan = _replayed_plan(make_config, dict(SEQUENTIAL))
    assert set(design.last_table.start) == {0, 2, 4}
    assert plan.critical_starts == [0, 1, 2, 3, 4]
    assert plan.critical_stretches() == [[0, 1, 2, 3, 4]]
    implied = next(f for f in plan.facts if f.code == planner.IMPLIED)
    assert list(implied.starts) == [1, 3]
    assert "critical window: starts 0 to 4" in format_plan(plan)


def test_a_level_never_measured_still_gets_its_implied_answer(make_config):
    # Critical at the mildest and the harshest level at both starts: the middle levels are
    # implied critical and never trained. The plan answers every level, and the severity
    # table keeps each level in its own column.
    levels = [0.5, 1.0, 2.0, 4.0]
    block = dict(SEQUENTIAL, severity={"param": "sigma", "levels": levels}, first_start=0,
                 last_start=4, initial_step=4, resolution=4)
    design, plan = _replayed_plan(make_config, block)
    measured = set(design.last_table.variant)
    assert measured == {design.key_of(0), design.key_of(3)}
    assert list(plan.answers) == [design.key_of(v) for v in range(4)]
    for level in (1, 2):
        answer = plan.answers[design.key_of(level)]
        assert answer.starts == [] and answer.critical_starts == [0, 4]
        assert [f.starts for f in answer.facts if f.code == planner.IMPLIED] == [(0, 4)]
    text = answer_text(plan)
    assert "critical window: starts 0 to 4" in text
    lines = severity_lines(plan)
    head, rows = lines[1], lines[3:]
    assert len(rows) == 2 and all(len(r) == len(head) for r in rows)
    assert all(r.split()[3:5] == ["-", "-"] for r in rows)  # start, CRITICAL +x.xx, -, -
