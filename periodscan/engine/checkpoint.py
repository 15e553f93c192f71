"""Checkpoints as bytes: what a branch needs to continue exactly where its parent stopped.

A checkpoint holds the model state (BatchNorm running statistics included), the optimizer state
(momentum / Adam moments and step counts), a torch learning-rate scheduler's state when the
schedule has one, and the epoch. Built-in learning rates are a pure function of the epoch and
every RNG is reseeded per epoch, so nothing else is needed. Tensors are saved on the CPU
whatever device trained them, and loaded onto the CPU, so a checkpoint made on a GPU resumes
anywhere (the optimizer moves its state to its parameters' device). Bytes travel to worker
processes or cluster nodes directly; on disk they are written atomically and verified by hash,
and always loaded with ``weights_only=True`` so a checkpoint can never run code.
"""

from __future__ import annotations

import hashlib
import io
import os
import secrets
from pathlib import Path
from typing import Any

import torch

from periodscan.engine.device import on_cpu

#: Random temporary names tried before giving up (48 random bits each: a clash is a bug).
TEMPORARY_ATTEMPTS = 100


def to_bytes(model: torch.nn.Module, optimizer: torch.optim.Optimizer, epoch: int,
             lr_scheduler: torch.optim.lr_scheduler.LRScheduler | None = None) -> bytes:
    """Serialise model, optimizer (and scheduler) state after ``epoch`` epochs of training."""
    state = {"epoch": int(epoch), "model": on_cpu(model.state_dict()),
             "optimizer": on_cpu(optimizer.state_dict())}
    if lr_scheduler is not None:
        state["lr_scheduler"] = on_cpu(lr_scheduler.state_dict())
    buffer = io.BytesIO()
    torch.save(state, buffer)
    return buffer.getvalue()


def restore(state: dict[str, Any], model: torch.nn.Module, optimizer: torch.optim.Optimizer,
            lr_scheduler: torch.optim.lr_scheduler.LRScheduler | None = None) -> None:
    """Load a :func:`from_bytes` state into freshly built objects (of the same config)."""
    model.load_state_dict(state["model"])
    optimizer.load_state_dict(state["optimizer"])
    if (lr_scheduler is not None) != ("lr_scheduler" in state):
        raise RuntimeError("checkpoint and config disagree on whether a torch learning-rate "
                           "scheduler is used")
    if lr_scheduler is not None:
        lr_scheduler.load_state_dict(state["lr_scheduler"])


def from_bytes(blob: bytes) -> dict[str, Any]:
    """Inverse of :func:`to_bytes`; refuses anything but tensors and plain containers."""
    return torch.load(io.BytesIO(blob), map_location="cpu", weights_only=True)


def sha256(blob: bytes) -> str:
    """Hex digest recorded in the ledger beside every checkpoint file."""
    return hashlib.sha256(blob).hexdigest()


def write_atomic(path: str | os.PathLike, blob: bytes) -> None:
    """Write to a temporary file in the same folder, fsync, then rename over ``path``.

    The file gets the permissions of any newly created file: 0o666 less the process umask
    (0o644 under the usual umask 0o022), applied by the kernel when the temporary is created.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = _new_temporary(path)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(blob)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _fsync_folder(path.parent)


def _new_temporary(path: Path) -> tuple[int, Path]:
    """Create ``.<name>.<random>.tmp`` beside ``path``, exclusively, with mode 0o666 & ~umask.

    ``tempfile.mkstemp`` would give 0o600 whatever the umask, and the rename keeps that mode.
    Asking ``open(2)`` for 0o666 lets the kernel subtract the umask, without reading it (reading
    it means setting it, which races with other threads).
    """
    flags = (os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0)
             | getattr(os, "O_CLOEXEC", 0))
    for _ in range(TEMPORARY_ATTEMPTS):
        tmp = path.parent / f".{path.name}.{secrets.token_hex(6)}.tmp"
        try:
            return os.open(tmp, flags, 0o666), tmp
        except FileExistsError:
            continue
    raise FileExistsError(f"no free temporary name beside {path} after "
                          f"{TEMPORARY_ATTEMPTS} attempts")


def _fsync_folder(folder: Path) -> None:
    """Make the rename itself durable (POSIX); a no-op where folders cannot be opened."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def remove_temporaries(*folders: str | os.PathLike) -> int:
    """Delete half-written ``.<name>.*.tmp`` files a killed sweep left behind; return how many.

    Only call this while holding the folder's lock: a live writer's temporary would go too.
    """
    removed = 0
    for folder in map(Path, folders):
        if folder.is_dir():
            for tmp in folder.glob(".*.tmp"):
                tmp.unlink(missing_ok=True)
                removed += 1
    return removed


def read_verified(path: str | os.PathLike, expected_sha256: str) -> bytes | None:
    """The file's bytes if it exists and matches the recorded hash, else None."""
    try:
        blob = Path(path).read_bytes()
    except OSError:
        return None
    return blob if sha256(blob) == expected_sha256 else None
