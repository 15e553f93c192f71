"""Status of finished, stopped, failed and running sweeps, read from a real tiny sweep's ledger."""

from __future__ import annotations

import json
import os
import shutil
import sqlite3

import pytest
import yaml
from test_api import build_tiny_sweep

from periodscan.api import load_sweep
from periodscan.cli import main
from periodscan.jobs.prepare import prepare


@pytest.fixture(scope="module")
def sweep_folder(tmp_path_factory):
    return build_tiny_sweep(tmp_path_factory.getbasetemp() / "shared_sweep")


@pytest.fixture
def copy(sweep_folder, tmp_path):
    target = tmp_path / "tiny"
    shutil.copytree(sweep_folder, target)
    return target


def _sql(folder, *statements):
    conn = sqlite3.connect(folder / "ledger.sqlite")
    with conn:
        for statement, args in statements:
            conn.execute(statement, args)
    conn.close()


def test_finished_sweep(sweep_folder):
    with load_sweep(sweep_folder) as view:
        status = view.status()
        config = view.config
    tree = prepare(config).tree
    assert status.state == "finished"
    assert status.runs_done == status.runs_total == len(tree.runs) == 21
    # Every epoch of the shared tree was trained once.
    assert status.epochs_done == status.epochs_total == tree.epochs_shared
    assert status.eta_seconds == 0 and status.failures == []


def _path(folder, run_id):
    conn = sqlite3.connect(folder / "ledger.sqlite")
    path = conn.execute("SELECT path FROM runs WHERE run_id=?", (run_id,)).fetchone()[0]
    spans = dict(conn.execute("SELECT segment_id, end_epoch - begin_epoch FROM segments"))
    conn.close()
    return path.split(","), spans


def test_stopped_sweep_counts_what_is_left_and_estimates_time(copy):
    # Undo the last segment of one run (as if the sweep was killed before it finished).
    path, spans = _path(copy, "seed2-w4+4-to8")
    branch = path[-1]  # the deficit segment only this run uses
    _sql(copy, ("UPDATE runs SET status='pending' WHERE run_id='seed2-w4+4-to8'", ()),
         ("UPDATE segments SET status='pending' WHERE segment_id=?", (branch,)),
         ("DELETE FROM epochs WHERE segment_id=?", (branch,)))
    with load_sweep(copy) as view:
        status = view.status()
    assert status.state == "stopped"
    assert status.runs_done == 20 and status.runs_by_status["pending"] == 1
    assert status.epochs_total - status.epochs_done == spans[branch] >= 1
    # ETA = epochs left x measured seconds per epoch / workers (module docstring's formula).
    assert status.seconds_per_epoch > 0
    assert status.eta_seconds == pytest.approx(
        spans[branch] * status.seconds_per_epoch / status.workers)


def test_failures_are_listed_and_their_epochs_wait_for_a_rerun(copy):
    path, spans = _path(copy, "seed1-w2+3-to8")
    _sql(copy, ("UPDATE runs SET status='failed', error=? WHERE run_id='seed1-w2+3-to8'",
                ("Traceback...\nRuntimeError: out of memory",)),
         ("UPDATE segments SET status='failed' WHERE segment_id=?", (path[-1],)))
    with load_sweep(copy) as view:
        status = view.status()
        table = view.table()
    assert status.state == "finished with failures"
    assert status.failures == [("seed1-w2+3-to8", "RuntimeError: out of memory")]
    assert status.epochs_waiting_on_failures == spans[path[-1]]
    # The failed run is out of the mean but shown: 2 seeds behind the window, 1 failed.
    row = table[(table.start == 2) & (table.length == 3)].iloc[0]
    assert (row.seeds, row.failed) == (2, 1)


def test_running_and_stale_locks(copy):
    (copy / "sweep.lock").write_text(json.dumps({"pid": os.getpid(),
                                                 "host": os.uname().nodename}))
    with load_sweep(copy) as view:
        assert view.status().state == "running"
    (copy / "sweep.lock").write_text(json.dumps({"pid": 2 ** 22 + 12345,
                                                 "host": os.uname().nodename}))
    with load_sweep(copy) as view:
        status = view.status()
    assert status.state == "finished" and "stale" in status.owner


def test_cli_status_text_and_json(sweep_folder, capsys):
    assert main(["status", str(sweep_folder)]) == 0
    out = capsys.readouterr().out
    assert "finished" in out and "runs:   21 / 21 finished" in out
    assert main(["status", "tiny", "--results-dir", str(sweep_folder.parent), "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["runs_total"] == 21 and data["state"] == "finished"
    config = yaml.safe_load((sweep_folder / "config.yaml").read_text())
    assert data["workers"] == 1 and config["executor"]["kind"] == "serial"
