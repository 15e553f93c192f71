"""Deficit variants: severity levels and several deficits in one sweep, on one trunk per seed.

Exact branching of variant runs is checked in tests/test_branching.py; here: the config
fields and their messages, ids and identities that stay as they were without variants, the
ledger column, the table per variant (Holm per variant and length, against statsmodels), the
severity answer, the ranking statistic (against scipy.stats.ttest_rel), and the plan, report
and dry run of finished tiny sweeps.
"""

from __future__ import annotations

import hashlib
import json
import sqlite3

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.multitest import multipletests

from periodscan.analysis.sensitivity import TableOptions
from periodscan.analysis.variants import rank_lapses, severity_answers, variant_table
from periodscan.api import load_sweep
from periodscan.cli import main
from periodscan.config import training_identity
from periodscan.designs import load_design
from periodscan.designs.variants import variant_identity
from periodscan.engine.tree import RunSpec, baseline, build_tree, segment_id
from periodscan.errors import ConfigError
from periodscan.jobs.prepare import prepare
from periodscan.jobs.sweep import run_sweep
from periodscan.ledger import Ledger

SEVERITY = {"param": "sigma", "levels": [1.0, 2.0, 4.0]}
DEFICITS = ["blur", "label_noise", "crop"]


def _window(**design):
    return {"design": {"kind": "window", "starts": [1, 3], "lengths": [2],
                       "budget": "fixed_total", "recovery_epochs": None, **design}}


# --- config fields and their messages ---------------------------------------------------------

@pytest.mark.parametrize(("design", "field"), [
    ({"severity": {"param": "std", "levels": [1, 2]}}, "design.severity.param"),
    ({"severity": {"param": "sigma", "levels": [1, 1]}}, "design.severity.levels"),
    ({"severity": {"param": "sigma", "levels": []}}, "design.severity.levels"),
    ({"severity": {"param": "sigma", "levels": [1], "order": "up"}}, "design.severity"),
    ({"severity": SEVERITY, "deficits": DEFICITS}, "design.deficits"),
    ({"deficits": ["blur", "no_such_deficit"]}, "design.deficits"),
    ({"deficits": ["blur", "blur"]}, "design.deficits"),
    ({"deficits": "blur"}, "design.deficits"),
])
def test_bad_variant_fields_name_the_field(make_config, design, field):
    with pytest.raises(ConfigError, match=f"The '{field}' parameter must be .* Got .* instead"):
        prepare(make_config(**_window(**design)))


def test_bad_level_names_the_variant_and_the_deficit_field(make_config):
    with pytest.raises(ConfigError, match=r"variant 'sigma=-1'.*deficit\.sigma"):
        prepare(make_config(**_window(severity={"param": "sigma", "levels": [1, -1]})))


def test_design_without_variants_refuses_them(make_config):
    adaptive = {"kind": "adaptive", "length": 2, "resolution": 1, "initial_step": 2,
                "first_start": 0, "last_start": 4, "seeds_initial": 2, "seeds_max": 3,
                "max_rounds": 4, "budget": "fixed_total", "recovery_epochs": None,
                "severity": SEVERITY}
    with pytest.raises(ConfigError, match="'design.severity' parameter must be null"):
        prepare(make_config(design=adaptive))


def test_variants_compose_from_overrides(tmp_path):
    prep = prepare(["experiment=tiny", f"results_dir={tmp_path}",
                    "design.deficits=[blur,label_noise,{_target_:periodscan.deficits.Blur,"
                    "sigma:4.0}]"])
    blocks = prep.design.variant_blocks()
    assert list(blocks) == ["blur", "label_noise", "Blur(sigma=4)"]
    assert blocks["label_noise"]["_target_"] == "periodscan.deficits.LabelNoise"
    assert blocks["Blur(sigma=4)"] == {"_target_": "periodscan.deficits.Blur", "sigma": 4.0}


# --- what stays as it was without variants ----------------------------------------------------

def test_ids_without_variants_are_as_before():
    run = RunSpec(seed=3, start=10, length=15, end=60)
    assert run.run_id == "seed3-w10+15-to60"
    assert RunSpec(seed=3, start=10, length=15, end=60, variant="sigma=2").run_id == \
        "seed3-w10+15-to60@sigma=2"
    # The id formula of earlier versions, sha1 of "identity|seed|flags".
    flags = "0" * 10 + "1" * 15
    assert segment_id("abc", 3, flags) == hashlib.sha1(
        f"abc|3|{flags}".encode()).hexdigest()[:16]


def test_variant_segments_share_the_clean_prefix_only():
    runs = [RunSpec(seed=0, start=4, length=2, end=8, variant=v) for v in ("a", "b")]
    tree = build_tree([*runs, baseline(0, 8)], "id")
    plain = build_tree([RunSpec(seed=0, start=4, length=2, end=8), baseline(0, 8)], "id")
    clean = [s for s in tree.segments.values() if not s.variant]
    # The clean trunk keeps the ids it has in a sweep without variants.
    assert {s.segment_id for s in clean} <= set(plain.segments)
    assert sum(s.epochs for s in clean) == 8
    tails = {s.variant: s.segment_id for s in tree.segments.values() if s.begin == 6}
    assert set(tails) == {"a", "b"} and tails["a"] != tails["b"]


def test_identity_covers_variants_only_when_there_are_some(make_config):
    plain_cfg = prepare(make_config())
    assert plain_cfg.identity == training_identity(plain_cfg.plain)
    assert variant_identity("x", {}) == "x"
    sev = prepare(make_config(**_window(severity=SEVERITY)))
    more = prepare(make_config(**_window(severity={"param": "sigma", "levels": [1.0, 2.0, 8.0]})))
    assert len({plain_cfg.identity, sev.identity, more.identity}) == 3


def test_fingerprint_covers_a_user_deficit_given_as_a_variant(make_config):
    # tests/user_plugins.py is a user's module (pytest puts tests/ on sys.path).
    user = {"_target_": "user_plugins.SignFlipHalf", "share": 0.5}
    prep = prepare(make_config(**_window(deficits=["blur", user])))
    code = prep.fingerprint["code"]
    assert list(code) == ["variants.SignFlipHalf(share=0.5)"]
    assert code["variants.SignFlipHalf(share=0.5)"]["file"] == "user_plugins.py"
    assert prepare(make_config()).fingerprint["code"] == {}


# --- the ledger ---------------------------------------------------------------------------------

OLD_RUNS = """CREATE TABLE runs (
    run_id TEXT PRIMARY KEY, seed INTEGER, start_epoch INTEGER, length INTEGER,
    end_epoch INTEGER, is_baseline INTEGER, config_hash TEXT, status TEXT, path TEXT,
    test_acc REAL, test_loss REAL, n_test INTEGER, correct BLOB, diverged_at INTEGER,
    error TEXT, finished_at REAL)"""


def test_old_ledger_reads_as_no_variant_and_gains_the_column(tmp_path):
    conn = sqlite3.connect(tmp_path / "ledger.sqlite")
    conn.execute(OLD_RUNS)
    conn.execute("INSERT INTO runs (run_id, seed, start_epoch, length, end_epoch, is_baseline, "
                 "status, path) VALUES ('seed0-w1+2-to8', 0, 1, 2, 8, 0, 'pending', 'a,b')")
    conn.commit()
    conn.close()
    reader = Ledger.read_only(tmp_path)
    assert list(reader.runs_frame().variant) == [""]
    reader.close()
    ledger = Ledger(tmp_path)  # opened for writing: ALTER TABLE adds the column
    ledger.register([], [RunSpec(seed=0, start=3, length=2, end=8, variant="sigma=2")],
                    {"seed0-w3+2-to8@sigma=2": ["c"]}, "h")
    frame = ledger.runs_frame().set_index("run_id")
    ledger.close()
    assert frame.variant.to_dict() == {"seed0-w1+2-to8": "", "seed0-w3+2-to8@sigma=2": "sigma=2"}


# --- the table, the severity answer and the ranking on synthetic runs -------------------------

def _runs(accuracies: dict[tuple[str, int], list[float]], base: list[float]) -> pd.DataFrame:
    """A runs frame: baselines with accuracies ``base`` (one per seed) and, per (variant,
    start), window runs of length 2 with the given accuracies."""
    rows = [{"run_id": f"b{s}", "seed": s, "start_epoch": 0, "length": 0, "end_epoch": 8,
             "is_baseline": 1, "status": "done", "test_acc": a, "n_test": 1000, "variant": ""}
            for s, a in enumerate(base)]
    for (variant, start), accs in accuracies.items():
        rows += [{"run_id": f"{variant}{start}s{s}", "seed": s, "start_epoch": start,
                  "length": 2, "end_epoch": 8, "is_baseline": 0, "status": "done",
                  "test_acc": a, "n_test": 1000, "variant": variant}
                 for s, a in enumerate(accs)]
    return pd.DataFrame(rows)


RNG = np.random.default_rng(7)
BASE = list(0.9 + RNG.normal(0, 0.01, 6))
SYNTHETIC = {(v, start): list(np.array(BASE) - shift + RNG.normal(0, 0.001, 6))
             for v, shifts in {"mild": (0.001, 0.0), "hard": (0.05, 0.002),
                               "harsh": (0.09, 0.03)}.items()
             for start, shift in zip((1, 5), shifts, strict=True)}
COLUMNS = [("mild", {"severity": 1.0}), ("hard", {"severity": 2.0}), ("harsh", {"severity": 4.0})]


def test_variant_table_holm_per_variant_and_length():
    table = variant_table(_runs(SYNTHETIC, BASE), 8, TableOptions(tolerance=0.5), None, COLUMNS)
    assert list(table.columns[:3]) == ["variant", "severity", "start"]
    assert list(pd.unique(table.variant)) == ["mild", "hard", "harsh"]
    for _, family in table.groupby(["variant", "length"]):
        # Holm (1979) as statsmodels implements it (method named: its default is Holm-Sidak).
        expected = multipletests(family.p_value, method="holm")[1]
        np.testing.assert_allclose(family.p_holm, expected, rtol=1e-12)
    row = table[(table.variant == "hard") & (table.start == 1)].iloc[0]
    damage = (np.array(BASE) - np.array(SYNTHETIC[("hard", 1)])) * 100
    assert row.damage == pytest.approx(damage.mean(), rel=1e-12)


def test_severity_answer_most_severe_safe_and_least_severe_critical():
    table = variant_table(_runs(SYNTHETIC, BASE), 8, TableOptions(tolerance=0.5), None, COLUMNS)
    answers = {a.start: a for a in severity_answers(table, 2)}
    # At start 1 the mild level does no damage, the two others 5 and 9 points: safe up to 1,
    # critical from 2. At start 5 mild and hard are harmless, harsh costs 3 points.
    assert answers[1].verdicts == ["safe", "critical", "critical"]
    assert (answers[1].safe_up_to, answers[1].critical_from) == (1.0, 2.0)
    assert answers[5].verdicts == ["safe", "safe", "critical"]
    assert (answers[5].safe_up_to, answers[5].critical_from) == (2.0, 4.0)


def test_ranking_gap_is_the_paired_t_test_of_scipy():
    runs = _runs(SYNTHETIC, BASE)
    table = variant_table(runs, 8, TableOptions(tolerance=0.5), None, COLUMNS)
    ranking = {r.start: r for r in rank_lapses(runs, table, 2, 0.95)}
    first = ranking[1]
    assert first.order == ["harsh", "hard", "mild"] and first.clear
    # damage(harsh) - damage(hard) per seed = acc(hard) - acc(harsh): scipy's paired t test.
    hard, harsh = (np.array(SYNTHETIC[(v, 1)]) * 100 for v in ("hard", "harsh"))
    reference = stats.ttest_rel(hard, harsh)
    assert first.p_value == pytest.approx(reference.pvalue, rel=1e-9)
    assert first.gap == pytest.approx(np.mean(hard - harsh), rel=1e-9)
    # Holm over the two starts: the smaller p-value is tested at alpha / 2, so its bounds are
    # scipy's interval at confidence 1 - 0.05 / 2.
    smaller = min(ranking.values(), key=lambda r: r.p_value)
    low, high = _scipy_interval(runs, smaller, 1 - 0.05 / 2)
    assert (smaller.gap_low, smaller.gap_high) == (pytest.approx(low), pytest.approx(high))
    pvalues = [ranking[s].p_value for s in (1, 5)]
    np.testing.assert_allclose([ranking[s].p_holm for s in (1, 5)],
                               multipletests(pvalues, method="holm")[1], rtol=1e-12)


def _scipy_interval(runs, ranking, confidence):
    a, b = (np.array(SYNTHETIC[(v, ranking.start)]) * 100 for v in ranking.order[:2])
    interval = stats.ttest_rel(b, a).confidence_interval(confidence)
    return interval.low, interval.high


# --- finished tiny sweeps: table, plan, report, dry run ---------------------------------------

@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """A severity sweep and a sweep of three deficits, 2 seeds, 6 epochs, via the CLI."""
    root = tmp_path_factory.mktemp("variants")
    common = ["experiment=tiny", f"results_dir={root}", "schedule.epochs=6",
              "design.starts=[1,3]", "design.lengths=[2]", "data.n_train=400", "-q"]
    assert main(["sweep", "name=sev", "design.severity={param:sigma,levels:[1,2,4]}",
                 *common]) == 0
    assert main(["sweep", "name=defs", "design.deficits=[blur,label_noise,crop]",
                 *common]) == 0
    return root


def test_csv_has_the_variant_columns_only_for_variants(finished):
    sev = pd.read_csv(finished / "sev" / "sensitivity.csv")
    defs = pd.read_csv(finished / "defs" / "sensitivity.csv")
    assert list(sev.columns[:3]) == ["variant", "severity", "start"]
    assert list(defs.columns[:3]) == ["variant", "deficit", "start"]
    assert sorted(sev.severity.unique()) == [1.0, 2.0, 4.0]
    assert list(pd.unique(defs.deficit)) == DEFICITS
    assert (sev.seeds == 2).all() and len(sev) == 6


def test_reader_restores_the_variants_from_the_ledger(finished):
    with load_sweep(finished / "sev") as view:
        meta = view.meta
        assert [v["key"] for v in meta["design_state"]["variants"]] == \
            ["sigma=1", "sigma=2", "sigma=4"]
        design = load_design(view.config, [0, 1], meta)
        assert [v.value for v in design.variants] == [1, 2, 4]
        assert set(view.runs.variant) == {"", "sigma=1", "sigma=2", "sigma=4"}


def test_plan_text_and_json(finished, capsys):
    assert main(["plan", str(finished / "sev")]) == 0
    text = capsys.readouterr().out
    assert "Severity by start" in text and "level: sigma 4" in text
    assert main(["plan", str(finished / "defs"), "--json"]) == 0
    record = json.loads(capsys.readouterr().out)
    assert list(record["answers"]) == DEFICITS
    assert [r["start"] for r in record["ranking"]] == [1, 3]
    assert all(set(r["order"]) == set(DEFICITS) for r in record["ranking"])


def test_report_draws_the_severity_map_and_overlay(finished):
    with load_sweep(finished / "sev") as view:
        files = view.report()
    names = {p.name for p in files.figures}
    assert {"sensitivity.png", "severity_map.png"} <= names
    page = files.html.read_text()
    assert "Severity by start" in page and "Severity &times; start" in page
    with load_sweep(finished / "defs") as view:
        page = view.report().html.read_text()
    assert "Which lapse costs most" in page and "deficit: label_noise" in page


def test_dry_run_says_the_trunk_is_trained_once(tmp_path, capsys):
    assert main(["sweep", "--dry-run", "experiment=tiny", f"results_dir={tmp_path}",
                 "design.severity={param:sigma,levels:[1,2,4]}"]) == 0
    out = capsys.readouterr().out
    # tiny: 8 epochs, starts 0, 2, 4 with 3-epoch windows, 2 seeds. Per seed the trunk (8)
    # once, then per level 8 + 6 + 4 branch epochs: 8 + 3 x 18 = 62; from scratch 10 x 8 = 80.
    assert "epochs to train: 124 with sharing, 160 trained one by one" in out
    assert "clean trunk: 8 epochs per seed, trained once per seed" in out


def test_removal_answers_for_each_variant(make_config, capsys):
    removal = {"kind": "removal", "until": [2, 4], "budget": "fixed_total",
               "recovery_epochs": None, "severity": {"param": "sigma", "levels": [1.0, 4.0]}}
    cfg = make_config(design=removal, schedule__epochs=6)
    prep = prepare(cfg)
    # Per seed: the clean baseline (6) once, and per level its deficit trunk 0-4 with clean
    # tails 2-6 and 4-6: 4 + 4 + 2 = 10; two levels, two seeds: (6 + 20) x 2 = 52.
    assert prep.tree.epochs_shared == 52
    run_sweep(cfg, quiet=True)
    with load_sweep(prep.folder) as view:
        answers = view.plan()
        assert list(answers.labels.values()) == ["sigma 1", "sigma 4"]
        assert {key: [r.epoch for r in a.rows] for key, a in answers.answers.items()} == \
            {"sigma=1": [2, 4], "sigma=4": [2, 4]}
    assert main(["plan", str(prep.folder), "--json"]) == 0
    assert list(json.loads(capsys.readouterr().out)["answers"]) == ["sigma=1", "sigma=4"]
