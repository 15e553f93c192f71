"""Command-line behaviour a new user ran into: each case as the user typed it.

Signals, pipes and warnings are properties of the real process, so these tests run the
installed ``periodscan`` entry point in a subprocess on the tiny preset.
"""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

TINY = ["experiment=tiny", "-q"]


def periodscan(*args: str, cwd: Path | None = None, **kwargs) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "periodscan.cli", *args], capture_output=True,
                          text=True, cwd=cwd, timeout=300, **kwargs)


def test_rerun_resume_dry_run_and_a_changed_key(tmp_path):
    first = periodscan("sweep", *TINY, f"results_dir={tmp_path}")
    assert first.returncode == 0, first.stderr
    assert "resuming" not in first.stderr
    # A dry run on the partly trained folder counts only what is left: seed 2's 26 epochs.
    dry = periodscan("sweep", *TINY, "seeds=3", f"results_dir={tmp_path}", "--dry-run")
    assert dry.returncode == 0, dry.stderr
    assert "epochs to train: 78 with sharing" in dry.stdout
    assert "already in the results folder: 8 of 12 runs finished; 26 of 78 epochs left" \
        in dry.stdout
    # The rerun says that it resumed and how much it reused.
    again = periodscan("sweep", *TINY, "seeds=3", f"results_dir={tmp_path}")
    assert again.returncode == 0, again.stderr
    assert "resuming: 8 of 12 runs already finished" in again.stderr
    assert "26 of 78 epochs left to train" in again.stderr
    # A changed training key is named with its old and new value; the folder is untouched.
    before = {p.name: p.stat().st_mtime_ns for p in (tmp_path / "tiny").iterdir()}
    other = periodscan("sweep", *TINY, "schedule.optimizer.lr=0.01", f"results_dir={tmp_path}")
    assert other.returncode == 2
    line = other.stderr.strip()
    assert "\n" not in line
    assert "schedule.optimizer.lr: 0.05 -> 0.01" in line
    assert {p.name: p.stat().st_mtime_ns for p in (tmp_path / "tiny").iterdir()} == before


def test_output_into_a_closed_pipe_is_not_a_traceback(tmp_path):
    assert periodscan("sweep", *TINY, f"results_dir={tmp_path}").returncode == 0
    for verb in ("status", "plan"):
        shell = (f"{sys.executable} -m periodscan.cli {verb} tiny --results-dir {tmp_path} "
                 "| head -c 1 > /dev/null")
        done = subprocess.run(["bash", "-c", shell], capture_output=True, text=True, timeout=120)
        assert "Traceback" not in done.stderr and "BrokenPipe" not in done.stderr


def test_sigterm_is_taken_like_ctrl_c(tmp_path):
    # A local pool of worker processes, slow enough to be caught mid-sweep.
    args = ["sweep", "experiment=tiny", "executor=local", "executor.workers=2", "seeds=2",
            "schedule.epochs=20", "design.starts=[0,5,10]", "-q", f"results_dir={tmp_path}"]
    proc = subprocess.Popen([sys.executable, "-m", "periodscan.cli", *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    ledger = tmp_path / "tiny" / "ledger.sqlite"
    deadline = time.time() + 120
    while not _some_segment_done(ledger) and time.time() < deadline:
        time.sleep(0.2)
    proc.send_signal(signal.SIGTERM)
    out, err = proc.communicate(timeout=120)
    assert proc.returncode == 128 + signal.SIGTERM
    assert "rerun the same command to resume" in err
    assert "Traceback" not in err and "leaked" not in err
    resumed = periodscan(*args)
    assert resumed.returncode == 0, resumed.stderr
    assert "resuming:" in resumed.stderr


def _some_segment_done(ledger: Path) -> bool:
    import sqlite3

    if not ledger.is_file():
        return False
    try:
        with sqlite3.connect(ledger) as conn:
            return conn.execute("SELECT count(*) FROM segments WHERE status = 'done'"
                                ).fetchone()[0] > 0
    except sqlite3.Error:
        return False


def test_taking_over_a_stale_lock_is_one_plain_line(tmp_path):
    folder = tmp_path / "tiny"
    folder.mkdir()
    gone = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True).stdout.strip()
    (folder / "sweep.lock").write_text(json.dumps({"pid": int(gone),
                                                   "host": socket.gethostname(),
                                                   "since": time.time()}))
    done = periodscan("sweep", *TINY, f"results_dir={tmp_path}")
    assert done.returncode == 0, done.stderr
    warned = [ln for ln in done.stderr.splitlines() if "stale lock" in ln]
    assert len(warned) == 1 and warned[0].startswith("periodscan: warning: ")
    assert "UserWarning" not in done.stderr and "warnings.warn" not in done.stderr


def test_forecast_follow_up_command_keeps_the_config_dir(tmp_path):
    configs = tmp_path / "my_configs" / "experiment"
    configs.mkdir(parents=True)
    (configs / "mine.yaml").write_text("# @package _global_\nname: mine\nseeds: 1\n")
    done = periodscan("forecast", "experiment=tiny", "experiment=mine", "-q",
                      f"results_dir={tmp_path}", "--config-dir", str(tmp_path / "my_configs"))
    if done.returncode != 0:
        pytest.fail(done.stderr)
    follow = [ln.strip() for ln in done.stdout.splitlines() if ln.strip().startswith(
        "periodscan sweep")]
    assert follow and "--config-dir" in follow[-1] and str(tmp_path / "my_configs") in follow[-1]
    assert os.path.isdir(tmp_path / "mine")
