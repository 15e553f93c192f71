"""Files the engine writes: atomic writes whose permissions follow the umask, hashes, verified
reads, and the folder lock.

Expected modes follow POSIX open(2): a file created with mode 0o666 gets ``0o666 & ~umask``.
"""

from __future__ import annotations

import os
import stat
import sys

import pytest
import torch

from periodscan.engine import checkpoint
from periodscan.engine.lock import LOCK_NAME, FolderLock
from periodscan.jobs.sweep import run_sweep
from periodscan.views.report import TABLE_CSV

posix_only = pytest.mark.skipif(sys.platform == "win32", reason="POSIX permission bits")


@pytest.fixture
def umask():
    """Set the process umask for one test and put the old one back afterwards."""
    old = os.umask(0o022)
    yield os.umask
    os.umask(old)


def _mode(path) -> int:
    return stat.S_IMODE(os.stat(path).st_mode)


@posix_only
@pytest.mark.parametrize("mask, expected", [(0o022, 0o644), (0o077, 0o600), (0o002, 0o664)])
def test_write_atomic_respects_the_umask(tmp_path, umask, mask, expected):
    umask(mask)
    target = tmp_path / "out" / "table.csv"
    checkpoint.write_atomic(target, b"a,b\n1,2\n")
    assert target.read_bytes() == b"a,b\n1,2\n"
    assert _mode(target) == expected
    checkpoint.write_atomic(target, b"replaced")  # a rewrite gets the mode afresh
    assert target.read_bytes() == b"replaced" and _mode(target) == expected


@posix_only
@pytest.mark.parametrize("mask, expected", [(0o022, 0o644), (0o002, 0o664)])
def test_lock_file_respects_the_umask(tmp_path, umask, mask, expected):
    umask(mask)
    with FolderLock(tmp_path):
        assert _mode(tmp_path / LOCK_NAME) == expected
    assert not (tmp_path / LOCK_NAME).exists()


@posix_only
def test_sweep_outputs_respect_the_umask(make_config, umask):
    umask(0o022)
    outcome = run_sweep(make_config(seeds=1, design__starts=[2], design__lengths=[3]),
                        quiet=True)
    written = [outcome.folder / "config.yaml", outcome.folder / TABLE_CSV,
               *sorted((outcome.folder / "checkpoints").glob("*.pt"))]
    assert len(written) > 2
    assert {p.name: _mode(p) for p in written} == {p.name: 0o644 for p in written}


def test_failed_write_leaves_no_temporary(tmp_path, monkeypatch):
    def fail(*args):
        raise OSError("simulated rename failure")

    (tmp_path / "x.bin").write_bytes(b"old")
    monkeypatch.setattr(checkpoint.os, "replace", fail)
    with pytest.raises(OSError, match="simulated"):
        checkpoint.write_atomic(tmp_path / "x.bin", b"new")
    assert [p.name for p in tmp_path.iterdir()] == ["x.bin"]
    assert (tmp_path / "x.bin").read_bytes() == b"old"


def test_remove_temporaries_deletes_only_temporaries(tmp_path):
    (tmp_path / ".a.pt.1234.tmp").write_bytes(b"half")
    (tmp_path / "a.pt").write_bytes(b"whole")
    assert checkpoint.remove_temporaries(tmp_path) == 1
    assert [p.name for p in tmp_path.iterdir()] == ["a.pt"]


def test_round_trip_and_verified_read(tmp_path):
    model = torch.nn.Linear(3, 2)
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    model(torch.ones(4, 3)).sum().backward()
    optimizer.step()
    blob = checkpoint.to_bytes(model, optimizer, epoch=5)
    state = checkpoint.from_bytes(blob)
    assert state["epoch"] == 5
    assert all(torch.equal(v, model.state_dict()[k]) for k, v in state["model"].items())
    path = tmp_path / "c.pt"
    checkpoint.write_atomic(path, blob)
    assert checkpoint.read_verified(path, checkpoint.sha256(blob)) == blob
    assert checkpoint.read_verified(path, "0" * 64) is None
    assert checkpoint.read_verified(tmp_path / "missing.pt", checkpoint.sha256(blob)) is None
