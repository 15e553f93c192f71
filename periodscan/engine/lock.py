"""One sweep per results folder: a lock file naming the owner's pid and host.

A lock left by a process that no longer exists on this host is taken over with a warning;
a live owner (or one on another host, which cannot be checked) makes the second sweep stop
with a message saying who holds the folder and how to free it.
"""

from __future__ import annotations

import json
import os
import socket
import time
import warnings
from pathlib import Path

from periodscan.errors import SweepError

LOCK_NAME = "sweep.lock"


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


class FolderLock:
    """Context manager holding ``<folder>/sweep.lock`` while a sweep writes the folder."""

    def __init__(self, folder: str | os.PathLike):
        self.path = Path(folder) / LOCK_NAME

    def __enter__(self) -> FolderLock:
        self.path.parent.mkdir(parents=True, exist_ok=True)
        owner = {"pid": os.getpid(), "host": socket.gethostname(), "since": time.time()}
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                self._handle_existing()
                continue
            with os.fdopen(fd, "w") as handle:
                json.dump(owner, handle)
            return self
        raise SweepError(f"could not take the lock {self.path}")

    def _handle_existing(self) -> None:
        try:
            holder = json.loads(self.path.read_text())
        except (OSError, ValueError):
            holder = {}
        pid, host = holder.get("pid"), holder.get("host")
        if host == socket.gethostname() and isinstance(pid, int) and not _alive(pid):
            warnings.warn(f"removing stale lock of dead process {pid} on {host}: {self.path}",
                          stacklevel=3)
            self.path.unlink(missing_ok=True)
            return
        raise SweepError(
            f"results folder {self.path.parent} is in use by another sweep (pid {pid} on host "
            f"{host}); wait for it, or delete {self.path} if that process is gone"
        )

    def __exit__(self, *exc) -> None:
        self.path.unlink(missing_ok=True)
