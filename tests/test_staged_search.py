"""The sequential design's search over starts and severity levels, on hand-made verdicts.

Every case is a situation drawn out by hand: which cells are measured, what they showed, and
which cells a bisection must measure next (or imply) if damage is monotone between them.
"""

import math

import pytest

from periodscan.designs.staged_search import (
    CRITICAL,
    SAFE,
    UNDETERMINED,
    UNKNOWN,
    Known,
    first_levels,
    implied_labels,
    level_labels,
    new_levels,
    next_cells,
)

C, S, U = (Known(label, True) for label in (CRITICAL, SAFE, UNDETERMINED))


def test_one_level_bisects_between_starts_whose_verdicts_differ():
    known = {(0, 0): C, (20, 0): S, (40, 0): S}
    assert next_cells(known, levels=1, resolution=2) == [(10, 0)]
    known[(10, 0)] = C
    assert next_cells(known, levels=1, resolution=2) == [(14, 0)]  # halfway on the 2-grid


def test_search_ends_when_neighbours_differ_only_at_the_resolution():
    known = {(0, 0): C, (10, 0): C, (12, 0): S, (40, 0): S}
    assert next_cells(known, levels=1, resolution=2) == []


def test_only_gaps_that_hold_an_edge_of_the_answer_are_searched():
    # no critical start and no trailing safe stretch: the answer has no edge to locate
    assert next_cells({(0, 0): S, (20, 0): U}, levels=1, resolution=5) == []
    # edges: after the latest critical start (10-20) and before the trailing safe stretch
    # (30-40); the safe/undetermined flip between 20 and 30 moves neither and is left alone
    known = {(0, 0): C, (10, 0): C, (20, 0): S, (30, 0): U, (40, 0): S}
    assert next_cells(known, levels=1, resolution=2) == [(14, 0), (34, 0)]
    # a critical stretch that begins late: the gap before its first start is searched too
    known = {(0, 0): S, (10, 0): C, (20, 0): S}
    assert next_cells(known, levels=1, resolution=2) == [(4, 0), (14, 0)]


def test_levels_bisect_between_differing_verdicts_at_one_start():
    # mildest safe, most severe critical: the middle level decides the threshold
    assert new_levels({0: S, 4: C}) == [2]
    assert new_levels({0: S, 2: S, 4: C}) == [3]
    assert new_levels({0: S, 3: S, 4: C}) == []  # threshold found between neighbours
    assert new_levels({0: C, 4: C}) == []  # critical at the mildest: critical at every level


def test_middle_first_measures_the_middle_then_the_side_left_open():
    assert first_levels(3, "middle") == [1]
    assert first_levels(5, "middle") == [2]
    assert first_levels(1, "middle") == [0]
    assert first_levels(3) == [0, 2]
    assert new_levels({1: C}, 3, "middle") == [0]  # the harsher level is implied critical
    assert new_levels({1: S}, 3, "middle") == [2]  # the milder level is implied safe
    assert new_levels({1: S, 2: C}, 3, "middle") == []
    assert new_levels({2: S}, 5, "middle") == [4]  # the middle of the run 3, 4
    with pytest.raises(ValueError, match="sideways"):
        first_levels(3, "sideways")


def test_middle_first_looks_both_ways_from_a_level_left_undetermined():
    # stopped undetermined (its mean below the tolerance steers the start search as safe): the
    # threshold is near it, so the milder level may be safe and the harsher critical
    near = Known(SAFE, True, UNDETERMINED)
    assert new_levels({1: near}, 3, "middle") == [0, 2]
    # while it is still open, its provisional label steers the level search as well
    assert new_levels({1: Known(SAFE, False)}, 3, "middle") == [2]


@pytest.mark.parametrize("search", ["ends", "middle"])
@pytest.mark.parametrize("levels", range(1, 10))
def test_level_search_finds_every_threshold(levels, search):
    # An oracle that answers without noise: levels below the threshold safe, the rest critical.
    # Both searches must end with every level labelled correctly; the middle-first search is a
    # binary search, so it measures at most ceil(log2(levels + 1)) levels (the decision-tree
    # bound for levels + 1 outcomes: Knuth, TAOCP vol. 3, section 6.2.1, from memory), and the
    # ends-first one at most two more than that.
    bound = math.ceil(math.log2(levels + 1))
    for threshold in range(levels + 1):
        truth = [SAFE] * threshold + [CRITICAL] * (levels - threshold)
        cells = {v: Known(truth[v], True) for v in first_levels(levels, search)}
        while todo := new_levels(cells, levels, search):
            cells.update({v: Known(truth[v], True) for v in todo})
        assert level_labels(cells, levels) == truth, (threshold, cells)
        assert len(cells) <= bound + (2 if search == "ends" else 0), (threshold, cells)


def test_unmeasured_levels_follow_monotonicity():
    assert level_labels({0: C}, 3) == [CRITICAL, CRITICAL, CRITICAL]
    assert level_labels({2: S}, 3) == [SAFE, SAFE, SAFE]
    assert level_labels({0: S, 4: S}, 5) == [SAFE] * 5
    assert level_labels({0: S, 4: C}, 5) == [SAFE, UNKNOWN, UNKNOWN, UNKNOWN, CRITICAL]
    assert level_labels({0: U, 2: U}, 3) == [UNDETERMINED] * 3


def test_new_start_between_differing_answers_gets_both_end_levels():
    known = {(0, 0): C, (0, 2): C, (20, 0): S, (20, 2): S}
    assert next_cells(known, levels=3, resolution=4) == [(8, 0), (8, 2)]


def test_starts_differing_only_at_a_middle_level_are_bisected():
    # start 0: threshold between levels 0 and 2 is level 1 (critical); start 20: level 1 safe
    known = {(0, 0): S, (0, 1): C, (0, 2): C, (20, 0): S, (20, 1): S, (20, 2): C}
    assert next_cells(known, levels=3, resolution=4) == [(8, 0), (8, 2)]


def test_implied_labels_fill_agreeing_gaps_and_leave_the_rest_unknown():
    known = {(0, 0): C, (10, 0): C, (12, 0): S, (20, 0): S, (30, 0): U}
    labels = implied_labels(known, 1, list(range(0, 31, 2)))
    assert [labels[(s, 0)] for s in range(0, 31, 2)] == (
        [CRITICAL] * 6 + [SAFE] * 5 + [UNKNOWN] * 4 + [UNDETERMINED])


def test_implied_labels_agree_level_by_level():
    # 24 measured at level 0 only; 36 at all three: level 0 agrees (safe) and is implied between
    # them, levels 1 and 2 do not (unknown at 24), so they stay unknown
    known = {(24, 0): S, (36, 0): S, (36, 1): U, (36, 2): U}
    labels = implied_labels(known, 3, [24, 28, 32, 36])
    assert [labels[(s, 0)] for s in (28, 32)] == [SAFE, SAFE]
    assert {labels[(s, v)] for s in (28, 32) for v in (1, 2)} == {UNKNOWN}
