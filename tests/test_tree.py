"""The run tree: sharing arithmetic and the invariant that every path replays its run."""

from __future__ import annotations

import random

import pytest

from periodscan.engine.tree import RunSpec, baseline, build_tree


def _window_runs(seed, epochs, starts, lengths):
    windows = [RunSpec(seed=seed, start=s, length=n, end=epochs)
               for s in starts for n in lengths]
    return windows + [baseline(seed, epochs)]


def test_one_dimensional_sweep_arithmetic():
    # Arithmetic worked by hand (issue on speed targets): 60 epochs, 10-epoch windows at
    # starts 0, 5, ..., 50 plus a baseline: 12 x 60 = 720 epochs from scratch; the tree trains
    # the trunk once (60) and every branch from its start to the end: 60 + sum(60 - s) = 445.
    tree = build_tree(_window_runs(0, 60, range(0, 51, 5), [10]), "id")
    assert tree.epochs_unshared == 720
    assert tree.epochs_shared == 60 + sum(60 - s for s in range(0, 51, 5)) == 445


def test_grid_arithmetic():
    # Starts 0, 6, ..., 42 x lengths 6, 12, 18 on 60 epochs: 25 runs -> 1,500 epochs from
    # scratch; windows sharing a start share their deficit segment: trunk 60 + per start
    # (18 epochs of deficit + 3 clean tails) = 852 (worked by hand in the speed issue).
    tree = build_tree(_window_runs(0, 60, range(0, 43, 6), [6, 12, 18]), "id")
    assert tree.epochs_unshared == 1500
    assert tree.epochs_shared == 852


def test_removal_shares_the_deficit_trunk():
    # Deficit from 0 until t in {5, 10, 20}, 30 epochs: clean baseline 30, deficit trunk 0-20,
    # clean tails 25 + 20 + 10 -> 105 epochs instead of 4 x 30 = 120.
    runs = [RunSpec(seed=0, start=0, length=t, end=30) for t in (5, 10, 20)] + [baseline(0, 30)]
    tree = build_tree(runs, "id")
    assert (tree.epochs_shared, tree.epochs_unshared) == (105, 120)


def _check_paths(tree):
    for run_id, path in tree.paths.items():
        run = tree.runs[run_id]
        epoch = 0
        parent = None
        for sid in path:
            seg = tree.segments[sid]
            assert seg.parent == parent and seg.begin == epoch and seg.seed == run.seed
            assert all(run.deficit_on(e) == seg.deficit_on for e in range(seg.begin, seg.end))
            epoch, parent = seg.end, sid
        assert epoch == run.end
        assert run in tree.segments[path[-1]].finishes


@pytest.mark.parametrize("trial", range(25))
def test_every_path_replays_its_run(trial):
    """Random designs (both budgets, several seeds): a run's segments cover exactly its epochs."""
    rng = random.Random(trial)
    runs = []
    for seed in range(rng.randint(1, 3)):
        for _ in range(rng.randint(1, 8)):
            start, length = rng.randint(0, 20), rng.randint(1, 10)
            end = rng.choice([30, start + length + rng.randint(0, 10)])
            runs.append(RunSpec(seed=seed, start=start, length=length,
                                end=max(end, start + length)))
        runs += [baseline(seed, e) for e in {r.end for r in runs if r.seed == seed}]
    tree = build_tree(runs, "id")
    _check_paths(tree)
    # Sharing never costs more than training each run alone.
    assert tree.epochs_shared <= tree.epochs_unshared


def test_segment_ids_depend_only_on_history():
    """Adding a start splits the trunk, yet every old segment's end state keeps its id, so an
    extended sweep reuses the checkpoints it already has."""
    small = build_tree(_window_runs(0, 20, [0, 10], [5]), "id")
    large = build_tree(_window_runs(0, 20, [0, 5, 10], [5]), "id")
    assert set(small.segments) < set(large.segments)
    for sid, seg in small.segments.items():
        twin = large.segments[sid]
        assert (twin.end, twin.deficit_on) == (seg.end, seg.deficit_on)
