"""sha256 of files' bytes, re-read only when a file's status changed since it was last hashed.

git's index keeps the same kind of record for a working tree (size, modification and
status-change times, inode per file) and re-reads a file only when one of them differs. Here
the record lives in a small SQLite file in periodscan's cache folder (``$PERIODSCAN_CACHE``, or
``~/.cache/periodscan``). The status-change time (ctime) moves on every write and on every
``os.utime`` call, so a file rewritten with its old size and its old modification time put
back is still re-read (tests/test_stream.py checks this).
Without a writable cache folder every file is read every time: slower, never wrong.
"""

from __future__ import annotations

import hashlib
import os
import sqlite3
from collections.abc import Sequence
from contextlib import closing

from periodscan.errors import DataError

#: (size, mtime_ns, ctime_ns, inode): what must be unchanged for a stored hash to be reused.
Status = tuple[int, int, int, int]

SCHEMA = ("CREATE TABLE IF NOT EXISTS files (path TEXT PRIMARY KEY, size INTEGER, "
          "mtime_ns INTEGER, ctime_ns INTEGER, inode INTEGER, sha256 TEXT)")


def cache_path() -> str:
    """Where the record of hashed files lives."""
    root = os.environ.get("PERIODSCAN_CACHE") or os.path.join("~", ".cache", "periodscan")
    return os.path.join(os.path.expanduser(root), "file-hashes.sqlite")


def status(path: str) -> Status:
    try:
        st = os.stat(path)
    except OSError as err:
        raise DataError(f"data: cannot read '{path}' to fingerprint it ({err.strerror})") from None
    return st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_ino


def sha256_of(path: str) -> str:
    try:
        with open(path, "rb") as handle:
            return hashlib.file_digest(handle, "sha256").hexdigest()
    except OSError as err:
        raise DataError(f"data: cannot read '{path}' to fingerprint it ({err.strerror})") from None


def file_digests(paths: Sequence[str]) -> list[str]:
    """Hex sha256 of each file's bytes, in order; unchanged files are not read again.

    Returns the same digests as hashing every file afresh (tests/test_stream.py compares with
    ``hashlib``). A file that changes while it is hashed is not recorded, so it is read again
    next time.
    """
    paths = [os.path.abspath(p) for p in paths]
    known = _recorded(paths)
    digests, fresh = [], []
    for path in paths:
        before = status(path)
        hit = known.get(path)
        if hit is not None and hit[0] == before:
            digests.append(hit[1])
            continue
        digest = sha256_of(path)
        digests.append(digest)
        if status(path) == before:
            fresh.append((path, *before, digest))
    if fresh:
        _record(fresh)
    return digests


def _recorded(paths: list[str]) -> dict[str, tuple[Status, str]]:
    """Stored (status, sha256) of the files under the paths' common folder."""
    if not paths:
        return {}
    prefix = os.path.commonpath(paths)
    try:
        with closing(sqlite3.connect(cache_path(), timeout=30)) as db:
            db.execute(SCHEMA)
            rows = db.execute("SELECT path, size, mtime_ns, ctime_ns, inode, sha256 FROM files "
                              "WHERE path >= ? AND path < ?", (prefix, prefix + "\U0010ffff"))
            return {row[0]: (tuple(row[1:5]), row[5]) for row in rows}
    except (sqlite3.Error, OSError):
        return {}


def _record(rows: list[tuple[str, int, int, int, int, str]]) -> None:
    try:
        os.makedirs(os.path.dirname(cache_path()), exist_ok=True)
        with closing(sqlite3.connect(cache_path(), timeout=30)) as db, db:
            db.execute(SCHEMA)
            db.executemany("INSERT OR REPLACE INTO files VALUES (?, ?, ?, ?, ?, ?)", rows)
    except (sqlite3.Error, OSError):
        pass  # no writable cache: the next fingerprint reads the files again
