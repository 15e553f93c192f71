"""Faults a long sweep meets: damaged checkpoints, unsafe checkpoints, runs that raise, workers
that die, a folder in use, a results folder that cannot be written, a damaged ledger.

Each test checks the promise made in DESIGN.md section 9: the sweep says what happened in one
line or one warning, keeps everything already finished, and a rerun ends with the same numbers.
"""

from __future__ import annotations

import errno
import hashlib
import io
import os
import pickle
import socket
import sqlite3
import subprocess
import sys
import textwrap

import pytest
import torch
from helpers import Payload

from periodscan.cli import main
from periodscan.commands.common import EXIT_SOME_FAILED
from periodscan.commands.sweep import exit_status
from periodscan.engine import checkpoint, runner
from periodscan.engine.lock import LOCK_NAME, FolderLock
from periodscan.errors import SweepError
from periodscan.jobs.prepare import prepare
from periodscan.jobs.sweep import run_sweep
from periodscan.ledger import Ledger
from periodscan.views.report import TABLE_CSV


def _runs(folder, exclude=()):
    with sqlite3.connect(folder / "ledger.sqlite") as conn:
        rows = conn.execute("SELECT run_id, status, test_acc, correct, error FROM runs "
                            "ORDER BY run_id").fetchall()
    return [r for r in rows if r[0] not in exclude]


def _trunk_checkpoint(cfg, epoch: int, seed: int = 0) -> str:
    """File name (under the sweep folder) of the clean trunk's checkpoint at ``epoch``."""
    prep = prepare(cfg)
    for segment_id in prep.tree.paths[f"seed{seed}-baseline-to8"]:
        if prep.tree.segments[segment_id].end == epoch:
            ledger = Ledger(prep.folder)
            name, _ = ledger.checkpoints()[segment_id]
            ledger.close()
            return name
    raise AssertionError(f"no trunk segment ends at epoch {epoch}")


# --- checkpoints ---------------------------------------------------------------------------

@pytest.fixture(scope="module")
def fresh_grown(tmp_path_factory):
    """The reference for the damaged-checkpoint tests: starts 0, 2, 4 trained in one go."""
    from conftest import tiny_config

    cfg = tiny_config(tmp_path_factory.mktemp("fresh"), seeds=1, design__starts=[0, 2, 4])
    return run_sweep(cfg, quiet=True).folder


@pytest.mark.parametrize("damage", ["truncate", "flip_byte"])
def test_damaged_checkpoint_is_detected_and_retrained(make_config, fresh_grown, damage):
    """Extend a finished sweep by one start: the trunk checkpoint it branches from is damaged."""
    first = make_config(seeds=1, design__starts=[0, 2], name="grown")
    run_sweep(first, quiet=True)
    name = _trunk_checkpoint(first, epoch=2)
    path = prepare(first).folder / name
    blob = path.read_bytes()
    if damage == "truncate":
        path.write_bytes(blob[: len(blob) // 2])
    else:
        path.write_bytes(blob[:100] + bytes([blob[100] ^ 0xFF]) + blob[101:])

    grown = make_config(seeds=1, design__starts=[0, 2, 4], name="grown")
    with pytest.warns(UserWarning, match="does not match its recorded sha256"):
        outcome = run_sweep(grown, quiet=True)
    assert (outcome.folder / TABLE_CSV).read_bytes() == (fresh_grown / TABLE_CSV).read_bytes()
    assert _runs(outcome.folder) == _runs(fresh_grown)
    assert path.read_bytes() == blob  # recomputed bit for bit (so its recorded hash holds again)


def test_pickled_payload_is_refused(tmp_path):
    """weights_only loading refuses a checkpoint that would run code when unpickled."""
    marker = tmp_path / "payload-ran"
    buffer = io.BytesIO()
    torch.save({"epoch": 1, "model": Payload(str(marker))}, buffer)
    # torch.load(weights_only=True) unpickles only tensors, primitive types and containers and
    # raises UnpicklingError otherwise (torch docs, "torch.load" and serialization notes).
    with pytest.raises(pickle.UnpicklingError, match="[Ww]eights only"):
        checkpoint.from_bytes(buffer.getvalue())
    assert not marker.exists()
    torch.load(io.BytesIO(buffer.getvalue()), weights_only=False)  # the payload is real:
    assert marker.exists()  # unsafe loading would have run it


def test_tampered_checkpoint_fails_its_branch_only(make_config, tmp_path):
    """A payload that also has its hash rewritten in the ledger is refused at load time."""
    first = make_config(seeds=1, design__starts=[0, 2], name="tampered")
    run_sweep(first, quiet=True)
    name = _trunk_checkpoint(first, epoch=2)
    folder = prepare(first).folder
    marker = tmp_path / "payload-ran"
    buffer = io.BytesIO()
    torch.save({"epoch": 2, "model": Payload(str(marker))}, buffer)
    (folder / name).write_bytes(buffer.getvalue())
    with sqlite3.connect(folder / "ledger.sqlite") as conn:
        conn.execute("UPDATE segments SET checkpoint_sha256=? WHERE checkpoint_file=?",
                     (hashlib.sha256(buffer.getvalue()).hexdigest(), name))

    outcome = run_sweep(make_config(seeds=1, design__starts=[0, 2, 4], name="tampered"),
                        quiet=True)
    runs = outcome.runs.set_index("run_id")
    new = ["seed0-w4+3-to8", "seed0-w4+4-to8"]  # the new runs, which branch from epoch 2
    assert (runs.status[new] == "failed").all()
    assert (runs.drop(new).status == "done").all()
    assert runs.error[new].str.contains("UnpicklingError: Weights only load failed").all()
    assert not marker.exists()


# --- runs that raise, workers that die -----------------------------------------------------

def test_a_run_that_raises_is_recorded_and_the_rest_goes_on(make_config, capsys):
    broken = make_config(seeds=2, name="broken",
                         deficit={"_target_": "helpers.FailingBlur", "sigma": 2.0, "fail_seed": 1})
    plain = make_config(seeds=2, name="plain")
    outcome = run_sweep(broken, quiet=True)
    runs = outcome.runs.set_index("run_id")
    seed1_windows = [r for r in runs.index if r.startswith("seed1-w")]
    assert (runs.status[seed1_windows] == "failed").all()
    assert runs.error[seed1_windows].str.contains("deliberate failure for seed 1").all()
    others = runs.drop(seed1_windows)
    assert (others.status == "done").all()
    assert (outcome.table.failed == 1).all() and (outcome.table.seeds == 1).all()
    # seed 0 trained exactly as with the plain Blur deficit
    reference = run_sweep(plain, quiet=True).runs.set_index("run_id")
    assert others.test_acc.to_dict() == reference.test_acc[others.index].to_dict()

    # The CLI exits with status 4 on such an outcome, and `status` lists the failures.
    assert exit_status(outcome.runs, lr=0.05) == EXIT_SOME_FAILED
    assert "failed with an error" in capsys.readouterr().err
    assert main(["status", str(outcome.folder)]) == 0
    shown = capsys.readouterr().out
    assert "seed1-w0+3-to8" in shown and "deliberate failure for seed 1" in shown


def test_dying_workers_are_retried_then_failed(make_config, tmp_path, monkeypatch):
    """Two local workers; one segment kills its worker once, another every time.

    loky's pool breaks with every death and takes the other segment in flight with it; the
    runner rebuilds the pool and retries lost segments one at a time, so only the segment that
    always dies ends up failed (after MAX_WORKER_RETRIES deaths while running alone; a loss in
    the shared pool is not counted, or the segment that dies once could fail when the other
    broke the pool first) and everything else matches a serial run exactly.
    """
    monkeypatch.setattr(runner, "MAX_WORKER_RETRIES", 1)
    deficit = {"_target_": "helpers.DyingBlur", "sigma": 2.0, "host_pid": os.getpid(),
               "always": [0, 0], "once": [1, 0], "marker": str(tmp_path / "died-once")}
    common = {"seeds": 2, "design__starts": [0, 2], "deficit": deficit}
    outcome = run_sweep(make_config(name="dying", executor={
        "kind": "local", "workers": 2, "threads_per_worker": 1}, **common), quiet=True)
    serial = run_sweep(make_config(name="serial", **common), quiet=True)

    assert (tmp_path / "died-once").exists()  # the one-time death really happened
    runs = outcome.runs.set_index("run_id")
    lost = ["seed0-w0+3-to8", "seed0-w0+4-to8"]  # both share the deficit segment [0, 3)
    assert (runs.status[lost] == "failed").all()
    assert runs.error[lost].str.contains(
        "worker lost 2 times while running alone: TerminatedWorkerError").all()
    assert _runs(outcome.folder, exclude=lost) == _runs(serial.folder, exclude=lost)
    assert (runs.drop(lost).status == "done").all()


# --- the results folder --------------------------------------------------------------------

HOLDER = textwrap.dedent("""
    import sys, time
    from periodscan.engine.lock import FolderLock
    with FolderLock(sys.argv[1]):
        print("locked", flush=True)
        time.sleep(120)
""")


def test_folder_in_use_is_refused_and_a_stale_lock_recovered(make_config, capsys):
    cfg = make_config(seeds=1, design__starts=[0], name="shared")
    folder = prepare(cfg).folder
    folder.mkdir(parents=True)
    holder = subprocess.Popen([sys.executable, "-c", HOLDER, str(folder)],
                              stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        with pytest.raises(SweepError) as info:
            run_sweep(cfg, quiet=True)
        message = str(info.value)
        assert f"pid {holder.pid}" in message and socket.gethostname() in message
        assert "in use" in message and "\n" not in message
        assert not (folder / "ledger.sqlite").exists()  # nothing written
    finally:
        holder.kill()
        holder.wait()
    # The holder died without cleaning up: its lock file is stale and is taken over.
    assert (folder / LOCK_NAME).exists()
    with pytest.warns(UserWarning, match=f"stale lock of process {holder.pid}"):
        outcome = run_sweep(cfg, quiet=True)
    assert (outcome.runs.status == "done").all()
    assert not (folder / LOCK_NAME).exists()


def test_lock_of_another_host_is_not_taken_over(tmp_path):
    (tmp_path / LOCK_NAME).write_text('{"pid": 1, "host": "some-other-node", "since": 0}')
    with pytest.raises(SweepError, match="another host.*pid 1 on host some-other-node"):
        with FolderLock(tmp_path):
            pass


def test_results_dir_that_cannot_be_created(make_config, tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    cfg = make_config(results_dir=str(blocker / "results"))
    with pytest.raises(SweepError, match="cannot be written.*Not a directory"):
        run_sweep(cfg, quiet=True)


# root bypasses permission bits (CAP_DAC_OVERRIDE, Linux capabilities(7)); CI runs as root.
@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0,
                    reason="root ignores folder permissions")
def test_read_only_results_folder(make_config, tmp_path):
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o500)
    try:
        with pytest.raises(SweepError, match="cannot be written.*[Pp]ermission"):
            run_sweep(make_config(results_dir=str(ro)), quiet=True)
    finally:
        ro.chmod(0o700)


def test_disk_full_stops_cleanly_and_resumes(make_config, monkeypatch):
    """ENOSPC on the third checkpoint write (simulated): one-line error, consistent ledger."""
    cfg = make_config(seeds=1, name="full")
    reference = run_sweep(make_config(seeds=1, name="roomy"), quiet=True)
    real_write, calls = checkpoint.write_atomic, []

    def write_until_full(path, blob):
        calls.append(path)
        if len(calls) == 3:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))
        real_write(path, blob)

    monkeypatch.setattr(checkpoint, "write_atomic", write_until_full)
    with pytest.raises(SweepError) as info:
        run_sweep(cfg, quiet=True)
    assert "No space left on device" in str(info.value) and "rerun" in str(info.value)
    folder = prepare(cfg).folder
    with sqlite3.connect(folder / "ledger.sqlite") as conn:
        named = {n for (n,) in conn.execute("SELECT checkpoint_file FROM segments")}
        digests = dict(conn.execute("SELECT checkpoint_file, checkpoint_sha256 FROM segments "
                                    "WHERE checkpoint_file IS NOT NULL").fetchall())
    assert len(digests) == 2  # the two checkpoints written before the disk filled up
    for name, digest in digests.items():
        assert hashlib.sha256((folder / name).read_bytes()).hexdigest() == digest
    failed_at = os.path.relpath(calls[2], folder)
    assert failed_at not in named and not os.path.exists(calls[2])
    assert not (folder / LOCK_NAME).exists()

    monkeypatch.setattr(checkpoint, "write_atomic", real_write)
    outcome = run_sweep(cfg, quiet=True)
    assert (outcome.folder / TABLE_CSV).read_bytes() == (reference.folder / TABLE_CSV).read_bytes()
    assert _runs(outcome.folder) == _runs(reference.folder)


def test_ledger_disk_full_is_one_line(make_config, monkeypatch):
    """SQLite's own 'database or disk is full' (simulated) becomes the same kind of message."""
    def full(*args, **kwargs):
        raise sqlite3.OperationalError("database or disk is full")

    monkeypatch.setattr(Ledger, "record_segment", full)
    with pytest.raises(SweepError, match="disk is full.*free some space"):
        run_sweep(make_config(seeds=1), quiet=True)


def test_damaged_ledger_is_reported(make_config):
    cfg = make_config(seeds=1)
    folder = prepare(cfg).folder
    folder.mkdir(parents=True)
    (folder / "ledger.sqlite").write_bytes(b"this is not an SQLite file" * 100)
    with pytest.raises(SweepError, match="ledger .* is damaged"):
        run_sweep(cfg, quiet=True)
