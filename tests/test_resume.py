"""Kill the sweep process with SIGKILL at chosen points, rerun the same command, get the same table.

The kill points are reached through the runner's test hook (``PERIODSCAN_TEST_KILL_AT``), so
each one is hit deterministically: after the first trunk segment, between its checkpoint's
rename and its ledger row; while branches run; and just before the table is written. One more
kill uses no hook at all: the test polls the ledger and kills the process at whatever it is
doing (most likely training an epoch) once a segment is recorded. After every kill the ledger must
only name checkpoints that exist with their recorded hash, and the resumed sweep's
sensitivity.csv and per-run results must equal those of an uninterrupted run exactly.
"""

from __future__ import annotations

import hashlib
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from periodscan.cli import main
from periodscan.engine.runner import KILL_ENV

# tiny preset, one seed, fewer examples: 9 segments (3 clean trunk, 3 deficit, 3 recovery),
# 26 epochs of 8 batches; about a second of training.
ARGS = ["sweep", "experiment=tiny", "seeds=1", "data.n_train=400", "schedule.batch_size=50"]
POINTS = {  # what the sweep was doing -> the runner's kill point
    "trunk trained, checkpoint written, ledger row not": "before-ledger:1",
    "while branches run": "after-ledger:5",
    "while writing results": "before-outputs",
}


def _args(root: Path, name: str, *extra: str) -> list[str]:
    return [*ARGS, f"results_dir={root}", f"name={name}", *extra, "-q"]


def _start(root: Path, name: str, kill_at: str | None, *extra: str) -> subprocess.Popen:
    env = dict(os.environ, **({KILL_ENV: kill_at} if kill_at else {}))
    return subprocess.Popen([sys.executable, "-m", "periodscan.cli", *_args(root, name, *extra)],
                            cwd=root, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)


def _results(folder: Path):
    with sqlite3.connect(folder / "ledger.sqlite") as conn:
        return conn.execute("SELECT run_id, status, test_acc, n_test, correct FROM runs "
                            "ORDER BY run_id").fetchall()


def _ledger_checkpoints_are_sound(folder: Path) -> set[str]:
    """Every checkpoint the ledger names is on disk with its recorded hash; return their names."""
    with sqlite3.connect(folder / "ledger.sqlite") as conn:
        rows = conn.execute("SELECT checkpoint_file, checkpoint_sha256 FROM segments "
                            "WHERE checkpoint_file IS NOT NULL").fetchall()
    for name, digest in rows:
        assert hashlib.sha256((folder / name).read_bytes()).hexdigest() == digest, name
    return {name for name, _ in rows}


def _says_stale_lock_once(err: str) -> None:
    """The rerun takes over the dead sweep's lock and says so in one plain line."""
    lines = [line for line in err.splitlines() if "stale lock" in line]
    assert len(lines) == 1, err
    assert lines[0].startswith("periodscan: warning: taking over the stale lock of process ")
    assert "warnings.warn" not in err and "UserWarning" not in err


@pytest.fixture(scope="module")
def killed(tmp_path_factory):
    """Start every hooked kill at once (they share the two cores), then the reference run."""
    root = tmp_path_factory.mktemp("resume")
    procs = {point: _start(root, f"k{i}", hook) for i, (point, hook) in enumerate(POINTS.items())}
    assert main(_args(root, "reference")) == 0  # uninterrupted, in this process
    outcomes = {}
    for i, (point, proc) in enumerate(procs.items()):
        _, err = proc.communicate(timeout=300)
        outcomes[point] = (root / f"k{i}", proc.returncode, err.decode())
    return root, outcomes


@pytest.mark.parametrize("point", list(POINTS))
def test_killed_sweep_resumes_to_the_same_table(killed, point, capsys):
    root, outcomes = killed
    folder, code, err = outcomes[point]
    assert code == -signal.SIGKILL, f"the kill hook did not fire (exit {code}): {err}"
    assert (folder / "sweep.lock").exists()  # left behind by the dead process
    referenced = _ledger_checkpoints_are_sound(folder)
    on_disk = {f"checkpoints/{p.name}" for p in (folder / "checkpoints").glob("*.pt")}
    assert referenced <= on_disk
    if POINTS[point].startswith("before-ledger"):
        (orphan,) = on_disk - referenced  # on disk, but the ledger never heard of it
        with sqlite3.connect(folder / "ledger.sqlite") as conn:
            row = conn.execute("SELECT deficit_on, begin_epoch, status FROM segments "
                               "WHERE segment_id=?", (Path(orphan).stem,)).fetchone()
        assert row == (0, 0, "pending")  # the clean trunk's first segment
    if point == "while writing results":
        assert not (folder / "sensitivity.csv").exists()
        assert {r[1] for r in _results(folder)} == {"done"}

    assert main(_args(root, folder.name)) == 0  # the same command again
    _says_stale_lock_once(capsys.readouterr().err)
    reference = root / "reference"
    assert (folder / "sensitivity.csv").read_bytes() == (reference / "sensitivity.csv").read_bytes()
    assert _results(folder) == _results(reference)
    assert not (folder / "sweep.lock").exists()
    assert not list(folder.glob(".*.tmp")) and not list(folder.glob("checkpoints/.*.tmp"))


def test_kill_at_an_unplanned_moment(killed, capsys):
    """No hook: poll the ledger and kill as soon as the first segment is recorded.

    The process is then most likely inside an epoch of the next segment.
    """
    root, _ = killed
    proc = _start(root, "polled", None)
    ledger = root / "polled" / "ledger.sqlite"
    deadline = time.monotonic() + 240
    done = 0
    while done < 1 and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
        try:
            with sqlite3.connect(f"file:{ledger}?mode=ro", uri=True, timeout=1) as conn:
                row = conn.execute("SELECT COUNT(*) FROM segments WHERE status='done'").fetchone()
            done = row[0]
        except sqlite3.Error:
            continue  # not created yet, or busy
    assert proc.poll() is None, "the sweep finished before it could be killed"
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=60)
    _ledger_checkpoints_are_sound(root / "polled")
    with sqlite3.connect(ledger) as conn:
        left = conn.execute("SELECT COUNT(*) FROM runs WHERE status != 'done'").fetchone()[0]
    assert left > 0, "nothing was left to resume"

    assert main(_args(root, "polled")) == 0
    _says_stale_lock_once(capsys.readouterr().err)
    reference = root / "reference"
    assert ((root / "polled" / "sensitivity.csv").read_bytes()
            == (reference / "sensitivity.csv").read_bytes())
    assert _results(root / "polled") == _results(reference)
