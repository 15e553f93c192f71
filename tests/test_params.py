"""The constraint table and its one message form, and the rules it fixes (one rule per field).

The message form follows scikit-learn's parameter validation ("The 'n_splits' parameter of
KFold must be an int in the range [2, inf). Got 1 instead."), checked here on our own fields.
"""

from __future__ import annotations

import pytest

from periodscan.analysis.planner import check_question
from periodscan.config import check_config, compose_config, to_plain
from periodscan.designs import design_kinds, load_design
from periodscan.errors import ConfigError
from periodscan.params import (
    CONFIDENCE,
    Interval,
    ListOf,
    Options,
    allowed,
    check_value,
    seed_list,
)


def _plan(overrides):
    plain = to_plain(compose_config(overrides))
    check_config(plain)
    return load_design(plain, seed_list(plain)).preview()


@pytest.mark.parametrize("constraint, inside, outside, words", [
    (Interval(int, 1, None), [1, 7], [0, -1, 1.5, True, "3"], "an int in the range [1, inf)"),
    (Interval(float, 0.5, 1.0, closed="left"), [0.5, 0.99], [0.4, 1.0, float("nan")],
     "a number in the range [0.5, 1)"),
    (Interval(float, 0.0, 1.0, closed="right"), [1.0, 0.3], [0.0, 1.1],
     "a number in the range (0, 1]"),
    (Options(("a", "b")), ["a"], ["c", None, 1], "one of 'a', 'b'"),
    (ListOf(Interval(int, 0, None), distinct=True), [[0, 3]], [[], [1, 1], [-1], 5],
     "a non-empty list without repeats of int >= 0s"),
])
def test_constraints_hold_and_say_what_they_allow(constraint, inside, outside, words):
    assert all(constraint.holds(v) for v in inside)
    assert not any(constraint.holds(v) for v in outside)
    assert str(constraint) == words


def test_one_message_form():
    with pytest.raises(ConfigError) as info:
        check_value("schedule.epochs", 0, [Interval(int, 1, None)])
    assert str(info.value) == ("The 'schedule.epochs' parameter must be an int in the range "
                               "[1, inf). Got 0 instead.")
    assert allowed([Interval(int, 1, None), None]) == "an int in the range [1, inf) or None"


def test_confidence_has_one_rule_for_sweep_plan_and_report():
    # Today's bug: a sweep accepted confidence=0.4, then plan and report refused the folder.
    # Every reader and the sweep now use the same constraint.
    with pytest.raises(ConfigError, match=r"'confidence'.*\[0.5, 1\)"):
        _plan(["experiment=tiny", "confidence=0.4"])
    with pytest.raises(ConfigError, match=r"'confidence'.*\[0.5, 1\)"):
        check_question(1, 0.5, 0.4, None)
    for level in (0.5, 0.8, 0.99):
        assert CONFIDENCE.holds(level)
        assert _plan(["experiment=tiny", f"confidence={level}"])
        check_question(1, 0.5, level, None)


def test_negative_seeds_are_refused():
    # seed -1 would make run ids like seed-1-baseline-to8, which read as seed 1.
    for value in ("[-1,2]", "-3"):
        with pytest.raises(ConfigError, match="'seeds'"):
            _plan(["experiment=tiny", f"seeds={value}"])


def test_a_window_longer_than_training_blames_the_lengths():
    with pytest.raises(ConfigError) as info:
        _plan(["experiment=tiny", "design.lengths=[10]"])
    message = str(info.value)
    assert "'design.lengths'" in message and "[1, 8]" in message and "[10]" in message


def test_a_window_past_the_end_blames_the_starts():
    with pytest.raises(ConfigError) as info:
        _plan(["experiment=tiny", "design.starts=[6]"])
    assert "'design.starts'" in str(info.value)
    assert "latest start is 5" in str(info.value) and "window [6, 9)" in str(info.value)


def test_lengths_must_be_at_least_one_and_the_message_says_so():
    with pytest.raises(ConfigError, match=r"'design.lengths'.*ints >= 1"):
        _plan(["experiment=tiny", "design.lengths=[0]"])


@pytest.mark.parametrize("span", ["${span:0,4,x}", "${span:4,0}", "${span:0}"])
def test_a_malformed_span_names_the_key_and_the_syntax(span):
    with pytest.raises(ConfigError) as info:
        _plan(["experiment=tiny", f"design.starts={span}"])
    message = str(info.value)
    assert "'design.starts'" in message and "span" in message
    assert "required but was not set" not in message


def test_allowed_choices_come_from_the_code():
    from periodscan.engine.executors import EXECUTORS
    from periodscan.engine.schedule import LR_SCHEDULES, OPTIMIZERS

    for override, choices in (("schedule.optimizer.name=rms", OPTIMIZERS),
                              ("schedule.lr_schedule.kind=cyclic", LR_SCHEDULES),
                              ("executor.kind=slurm", EXECUTORS),
                              ("design.kind=diagonal", design_kinds())):
        with pytest.raises(ConfigError) as info:
            _plan(["experiment=tiny", override])
        assert all(repr(c) in str(info.value) for c in choices)
