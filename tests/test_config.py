"""Configs tested through Hydra's compose API, without the CLI."""

from __future__ import annotations

import pytest

from periodscan.config import (
    GROUPS,
    available_options,
    check_config,
    compose_config,
    to_plain,
    training_identity,
)
from periodscan.designs import load_design
from periodscan.errors import ConfigError
from periodscan.params import seed_list


def plan_runs(plain):
    """What a job validates before it trains: settings, then the design's first round."""
    check_config(plain)
    return load_design(plain, seed_list(plain)).preview()


def test_default_is_the_demo():
    plain = to_plain(compose_config())
    runs = plan_runs(plain)
    # 5 starts (0, 10, ..., 40) x one 15-epoch length + 1 baseline, for 10 seeds; the last
    # window ends at epoch 55, leaving 5 clean epochs before the end.
    assert len(runs) == 10 * 6
    assert {r.end for r in runs} == {60}
    assert plain["data"]["_target_"].endswith("load_mnist1d")
    assert plain["deficit"]["_target_"].endswith("Blur")


@pytest.mark.parametrize("group", [g for g in GROUPS if g != "experiment"])
def test_every_option_composes(group):
    for option in available_options(group):
        cfg = compose_config([f"{group}={option}"])
        assert cfg[group] is not None


@pytest.mark.parametrize("preset", available_options("experiment"))
def test_presets_plan(preset):
    plain = to_plain(compose_config([f"experiment={preset}"]))
    assert plan_runs(plain)


def test_override_grammar_and_span():
    plain = to_plain(compose_config(["seeds=[3,7]", "design.starts=${span:0,20,10}",
                                     "design.lengths=[5,10]", "schedule.epochs=30"]))
    runs = plan_runs(plain)
    windows = sorted({(r.start, r.length) for r in runs if not r.is_baseline})
    assert windows == [(s, n) for s in (0, 10, 20) for n in (5, 10)]
    assert {r.seed for r in runs} == {3, 7}


def test_removal_and_fixed_recovery():
    plain = to_plain(compose_config(["design=removal", "design.until=[5,10]",
                                     "design.budget=fixed_recovery",
                                     "design.recovery_epochs=20"]))
    runs = plan_runs(plain)
    ends = {(r.start, r.length): r.end for r in runs if not r.is_baseline}
    assert ends == {(0, 5): 25, (0, 10): 30}
    assert {r.end for r in runs if r.is_baseline} == {25, 30}


def test_identity_ignores_design_but_not_training():
    a = to_plain(compose_config(["experiment=tiny"]))
    b = to_plain(compose_config(["experiment=tiny", "design.starts=[0,1]", "seeds=5"]))
    c = to_plain(compose_config(["experiment=tiny", "schedule.optimizer.lr=0.01"]))
    assert training_identity(a) == training_identity(b) != training_identity(c)


@pytest.mark.parametrize(
    "overrides, words",
    [
        (["deficit=blurr"], ["deficit", "blurr", "label_noise"]),
        (["schedule.epoch=3"], ["epoch"]),
        (["design.starts=[50]"], ["design.starts", "[50, 65)", "45"]),
        (["seeds=0"], ["seeds", "0"]),
        (["design.lengths=[]"], ["design.lengths"]),
        (["design.starts=[5,5]"], ["design.starts", "distinct"]),
        (["design.kind=diagonal"], ["design.kind", "window", "removal"]),
        (["schedule.optimizer.lr=-1"], ["schedule.optimizer.lr"]),
    ],
)
def test_bad_config_names_the_field(overrides, words):
    with pytest.raises(ConfigError) as info:
        plan_runs(to_plain(compose_config(overrides)))
    message = str(info.value)
    assert "\n" not in message
    for word in words:
        assert word in message
