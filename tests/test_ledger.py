"""The ledger on hand-made records: what goes in comes out, read-only means read-only, no torch."""

from __future__ import annotations

import sqlite3
import subprocess
import sys

import pytest

from periodscan.engine.records import EpochRecord, SegmentResult
from periodscan.engine.tree import RunSpec, build_tree
from periodscan.ledger import FILE_NAME, Ledger


def _epoch(epoch: int, seconds: float) -> EpochRecord:
    return EpochRecord(epoch=epoch, lr=0.1, train_loss=1.0, train_acc=0.5, test_loss=1.1,
                       test_acc=0.4, deficit_on=False, seconds=seconds)


@pytest.fixture
def filled(tmp_path):
    """One seed: baseline to 4 and a window [2, 3) to 4 -> trunk [0, 2), two branches."""
    tree = build_tree([RunSpec(seed=0, start=0, length=0, end=4),
                       RunSpec(seed=0, start=2, length=1, end=4)], identity="test")
    ledger = Ledger(tmp_path)
    ledger.register(tree.segments.values(), tree.runs.values(), tree.paths, "hash")
    trunk = tree.roots()[0]
    extras = [(0, "fisher/total", 2.0), (0, "fisher/head", 1.5), (1, "fisher/total", 3.0),
              (1, "fisherXtotal", 9.0), (1, "grad_norm", 0.25)]
    ledger.record_segment(
        SegmentResult(segment_id=trunk.segment_id, epochs=[_epoch(0, 0.5), _epoch(1, 0.75)],
                      extras=extras),
        checkpoint_file=None, digest=None, finishes=trunk.finishes, threads=1)
    yield tree, ledger
    ledger.close()


def test_meta_values_decode_json(filled):
    _, ledger = filled
    ledger.set_meta(command="periodscan sweep", seeds={"0": 3}, starts=[0, 10])
    assert ledger.meta_values() == {"command": "periodscan sweep", "seeds": {"0": 3},
                                    "starts": [0, 10]}
    assert ledger.get_meta("starts") == "[0, 10]"


def test_read_only_reads_and_refuses_writes(filled, tmp_path):
    tree, ledger = filled
    ledger.set_meta(command="x")
    reader = Ledger.read_only(tmp_path)
    try:
        assert reader.meta_values() == {"command": "x"}
        assert set(reader.run_paths_frame().run_id) == set(tree.runs)
        with pytest.raises(sqlite3.OperationalError, match="readonly"):
            reader.set_meta(command="y")
    finally:
        reader.close()
    missing = tmp_path / "nothing-here"
    missing.mkdir()
    with pytest.raises(sqlite3.OperationalError):
        Ledger.read_only(missing).meta_values()
    assert not (missing / FILE_NAME).exists()


def test_run_paths_and_epoch_seconds(filled):
    tree, ledger = filled
    paths = ledger.run_paths_frame().set_index("run_id")
    assert list(ledger.run_paths_frame().columns) == ["run_id", "status", "path", "error"]
    for run_id, path in tree.paths.items():
        assert paths.loc[run_id, "path"].split(",") == path
        assert paths.loc[run_id, "status"] == "pending"
    seconds = ledger.epoch_seconds_frame()
    assert list(seconds.columns) == ["segment_id", "seconds"]
    assert sorted(seconds.seconds) == [0.5, 0.75]


def test_extras_by_segment_and_prefix(filled):
    tree, ledger = filled
    trunk = tree.roots()[0].segment_id
    every = ledger.extras_by_segment()
    assert list(every.columns) == ["segment_id", "epoch", "name", "value"] and len(every) == 5
    fisher = ledger.extras_by_segment(prefix="fisher/")
    assert sorted(fisher.name) == ["fisher/head", "fisher/total", "fisher/total"]
    # '_' is a literal character, not LIKE's one-character wildcard
    assert list(ledger.extras_by_segment(prefix="grad_")["name"]) == ["grad_norm"]
    assert ledger.extras_by_segment(prefix="grad%").empty
    assert len(ledger.extras_by_segment([trunk], prefix="fisher/total")) == 2
    assert ledger.extras_by_segment(["no-such-segment"]).empty
    assert ledger.extras_by_segment([]).empty


def test_record_extras_and_readings_along_paths(filled):
    tree, ledger = filled
    branch = next(s for s in tree.segments.values() if s.parent and not s.deficit_on)
    ledger.record_extras([(branch.segment_id, 2, "fisher/total", 4.0),
                          (branch.segment_id, 3, "fisher/total", 5.0)])
    ledger.record_extras([(branch.segment_id, 3, "fisher/total", 6.0)])  # replaces
    along = ledger.extras_frame(prefix="fisher/total")
    baseline = next(r for r in tree.runs.values() if r.is_baseline).run_id
    mine = along[along.run_id == baseline].sort_values("epoch")
    assert list(mine.epoch) == [0, 1, 2, 3] and list(mine.value) == [2.0, 3.0, 4.0, 6.0]
    window = along[along.run_id != baseline]
    assert list(window.sort_values("epoch").epoch) == [0, 1]  # the shared trunk only


def test_finished_segment_finishes_its_runs(tmp_path):
    tree = build_tree([RunSpec(seed=1, start=0, length=0, end=2)], identity="t")
    ledger = Ledger(tmp_path)
    ledger.register(tree.segments.values(), tree.runs.values(), tree.paths, "h")
    (seg,) = tree.segments.values()
    ledger.record_segment(SegmentResult(segment_id=seg.segment_id, test_acc=0.75, n_test=4,
                                        correct=b"\xe0"), None, None, seg.finishes, threads=1)
    assert ledger.finished_runs() == {"seed1-baseline-to2"}
    assert ledger.correctness("seed1-baseline-to2") == (b"\xe0", 4)
    ledger.close()


def test_ledger_imports_neither_torch_nor_hydra():
    code = ("import sys, periodscan.ledger; "
            "print('torch' in sys.modules, 'hydra' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["False", "False"]
