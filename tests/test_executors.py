"""The same sweep on every executor gives the same numbers, bit for bit.

Serial (this process), local worker processes (joblib's loky, 2 workers) and a Dask
LocalCluster (2 single-threaded worker processes) train the same segments from the same bytes
at one torch thread each, so tables, per-run accuracies, per-example correctness and even the
checkpoint files must be identical (DESIGN.md section 11: the thread count is what changes
numbers, and it is fixed here). Rebuilding loky's pool after a worker dies is exercised in
tests/test_faults.py.
"""

from __future__ import annotations

import hashlib
import sqlite3

import pytest

from periodscan.jobs.sweep import run_sweep
from periodscan.views.report import TABLE_CSV


def _fingerprint(folder):
    """CSV bytes, per-run (status, accuracy, correctness) and checkpoint hashes of a sweep."""
    with sqlite3.connect(folder / "ledger.sqlite") as conn:
        runs = conn.execute("SELECT run_id, status, test_acc, correct FROM runs "
                            "ORDER BY run_id").fetchall()
        ckpts = conn.execute("SELECT segment_id, checkpoint_sha256 FROM segments "
                             "WHERE checkpoint_sha256 IS NOT NULL ORDER BY segment_id").fetchall()
    files = {p.name: hashlib.sha256(p.read_bytes()).hexdigest()
             for p in sorted((folder / "checkpoints").glob("*.pt"))}
    return (folder / TABLE_CSV).read_bytes(), runs, ckpts, files


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """Two seeds, two starts, one length over six epochs: 12 segments, a few seconds."""
    from conftest import tiny_config

    root = tmp_path_factory.mktemp("executors")
    base = {"seeds": 2, "design__starts": [0, 3], "design__lengths": [2], "schedule__epochs": 6}
    return lambda **changes: tiny_config(root, **{**base, **changes})


def test_serial_local_and_dask_agree(small):
    settings = {
        "serial": {"kind": "serial", "workers": 1, "threads_per_worker": 1},
        "local": {"kind": "local", "workers": 2, "threads_per_worker": 1},
        "dask": {"kind": "dask", "address": None, "workers": 2, "threads_per_worker": 1},
    }
    prints = {}
    for name, executor in settings.items():
        outcome = run_sweep(small(name=name, executor=executor), quiet=True)
        assert (outcome.runs.status == "done").all(), outcome.runs
        assert outcome.counts == {"done": 12, "failed": 0, "diverged": 0}
        prints[name] = _fingerprint(outcome.folder)
    reference = prints.pop("serial")
    for name, got in prints.items():
        assert got[0] == reference[0], f"{name}: sensitivity.csv differs from serial"
        assert got[1] == reference[1], f"{name}: per-run accuracy or correctness differs"
        assert got[2] == reference[2] and got[3] == reference[3], f"{name}: checkpoints differ"


def test_progress_bar_counts_every_epoch_and_quiet_silences_it(small, capsys):
    """One bar for the whole sweep, in epochs (its rate gives tqdm's ETA); -q prints nothing."""
    outcome = run_sweep(small(name="progress", seeds=1), quiet=False)
    err = capsys.readouterr().err
    total = outcome.epochs_shared
    assert f"{total}/{total}" in err and "epoch" in err and "100%" in err
    run_sweep(small(name="progress-quiet", seeds=1), quiet=True)
    assert capsys.readouterr().err == ""
