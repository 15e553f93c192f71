"""One sweep per results folder: ``sweep.lock`` names the owner's pid and host.

The owner holds an exclusive ``flock`` on the file for as long as it runs; the kernel drops that
lock when the process dies, however it dies (SIGKILL, power cut of a worker node excepted). So
a lock file whose kernel lock is free was left by a dead process: it is taken over with a
warning. A held lock stops the second sweep with a message saying who holds the folder. A lock
file written on another host is never taken over (its owner cannot be checked from here).
Where ``flock`` is missing (Windows, some network file systems) the file's pid is checked
instead, which cannot rule out two sweeps starting in the same instant.
"""

from __future__ import annotations

import json
import os
import socket
import time
import warnings
from pathlib import Path

from periodscan.errors import SweepError

try:
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None

LOCK_NAME = "sweep.lock"


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _read_holder(fd: int) -> dict:
    """The JSON the last owner wrote (empty if none or unreadable)."""
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        text = os.read(fd, 4096).decode()
        holder = json.loads(text) if text.strip() else {}
    except (OSError, ValueError):
        return {}
    return holder if isinstance(holder, dict) else {}


class FolderLock:
    """Context manager holding ``<folder>/sweep.lock`` while a sweep writes the folder."""

    def __init__(self, folder: str | os.PathLike):
        self.path = Path(folder) / LOCK_NAME
        self._fd: int | None = None

    def __enter__(self) -> FolderLock:
        for _ in range(3):
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o666)  # less the umask
            try:
                if self._acquire(fd):
                    self._fd = fd
                    return self
            except BaseException:
                os.close(fd)
                raise
            os.close(fd)  # the file was replaced while we locked it: try the new one
        raise SweepError(f"could not take the lock {self.path}; another sweep keeps replacing it")

    def _acquire(self, fd: int) -> bool:
        """Lock ``fd``; False if it no longer is the file at ``self.path``."""
        holder = _read_holder(fd)
        kernel_lock = False
        if fcntl is not None:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                kernel_lock = True
            except BlockingIOError:
                self._refuse(holder, "is in use by another sweep")
            except OSError:
                pass  # a file system without flock (some network mounts): check the pid instead
        if kernel_lock:
            try:
                if os.stat(self.path).st_ino != os.fstat(fd).st_ino:
                    return False
            except FileNotFoundError:
                return False
            holder = _read_holder(fd)
        if holder:
            self._take_over(holder, kernel_lock)
        os.ftruncate(fd, 0)
        os.lseek(fd, 0, os.SEEK_SET)
        owner = {"pid": os.getpid(), "host": socket.gethostname(), "since": time.time()}
        os.write(fd, json.dumps(owner).encode())
        os.fsync(fd)
        return True

    def _take_over(self, holder: dict, kernel_lock: bool) -> None:
        """A lock file nobody holds: refuse if it may belong to a live sweep, else warn."""
        pid, host = holder.get("pid"), holder.get("host")
        if host != socket.gethostname():
            self._refuse(holder, "was locked by a sweep on another host, which cannot be checked")
        if not kernel_lock and (not isinstance(pid, int) or _alive(pid)):
            self._refuse(holder, "is in use by another sweep")
        warnings.warn(f"taking over the stale lock of process {pid} on {host}, which is gone: "
                      f"{self.path}", stacklevel=4)

    def _refuse(self, holder: dict, why: str) -> None:
        pid, host = holder.get("pid", "?"), holder.get("host", "?")
        raise SweepError(f"results folder {self.path.parent} {why} (pid {pid} on host {host}); "
                         f"wait for it to finish, or delete {self.path} if that process is gone")

    def __exit__(self, *exc) -> None:
        if self._fd is not None:
            self.path.unlink(missing_ok=True)
            os.close(self._fd)  # releases the kernel lock
            self._fd = None
