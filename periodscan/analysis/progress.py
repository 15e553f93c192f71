"""Progress of a running or stopped sweep, read from its ledger.

Counts runs and epochs done against the design's total, lists failures, and estimates the time
left from the epoch times the ledger measured: remaining epochs x mean seconds per epoch /
workers. The estimate ignores that branches wait for their trunk, so it is a lower bound when
few segments remain.
"""

from __future__ import annotations

import json
import os
import socket
from dataclasses import dataclass, field

import pandas as pd

from periodscan.engine.lock import LOCK_NAME

FINAL = ("done", "diverged")


@dataclass
class SweepStatus:
    """Where a sweep stands."""

    name: str
    folder: str
    state: str  # "running", "stopped", "finished" or "finished with failures"
    runs_total: int
    runs_by_status: dict[str, int]
    epochs_total: int
    epochs_done: int
    epochs_waiting_on_failures: int
    seconds_per_epoch: float | None
    workers: int
    eta_seconds: float | None
    failures: list[tuple[str, str]] = field(default_factory=list)  # (run id, error line)
    owner: str | None = None
    last_update: float | None = None  # Unix seconds of the latest finished segment

    @property
    def runs_done(self) -> int:
        return sum(self.runs_by_status.get(s, 0) for s in FINAL)


def _owner(folder) -> tuple[bool, str | None]:
    """Is a sweep process holding the folder's lock right now, and who."""
    path = folder / LOCK_NAME
    if not path.is_file():
        return False, None
    try:
        holder = json.loads(path.read_text())
    except (OSError, ValueError):
        return True, "unknown owner"
    pid, host = holder.get("pid"), holder.get("host")
    label = f"pid {pid} on {host}"
    if host == socket.gethostname() and isinstance(pid, int):
        try:
            os.kill(pid, 0)
        except ProcessLookupError:
            return False, f"{label} (gone; stale lock)"
        except PermissionError:
            pass
    return True, label


def _workers(config: dict) -> int:
    executor = config.get("executor") or {}
    if executor.get("kind") == "serial":
        return 1
    return int(executor.get("workers") or os.cpu_count() or 1)


def remaining_segments(runs: pd.DataFrame, segments: pd.DataFrame) -> tuple[set[str], set[str]]:
    """Segments still to train for unfinished runs: (pending ones, failed ones needing a rerun)."""
    status = segments.set_index("segment_id").status.to_dict()
    pending, failed = set(), set()
    for row in runs[~runs.status.isin(FINAL)].itertuples():
        for sid in str(row.path or "").split(","):
            if status.get(sid) == "pending":
                pending.add(sid)
            elif status.get(sid) == "failed":
                failed.add(sid)
    return pending, failed


def sweep_status(view) -> SweepStatus:
    """Status of the sweep behind a :class:`periodscan.api.SweepView`."""
    runs = view.ledger.run_paths_frame()
    if view.run_ids is not None:
        runs = runs[runs.run_id.isin(view.run_ids)]
    segments = view.segments
    wanted = {sid for path in runs.path.dropna() for sid in str(path).split(",")}
    segments = segments[segments.segment_id.isin(wanted)]
    spans = (segments.end_epoch - segments.begin_epoch).set_axis(segments.segment_id)
    pending, failed = remaining_segments(runs, segments)
    epochs = view.ledger.epoch_seconds_frame()
    trained = set(segments.segment_id[segments.status.isin(FINAL)])
    epochs = epochs[epochs.segment_id.isin(trained)]
    left = int(spans[list(pending)].sum()) if pending else 0
    waiting = int(spans[list(failed)].sum()) if failed else 0
    done = len(epochs)
    per_epoch = float(epochs.seconds.mean()) if done else None
    workers = _workers(view.config)
    eta = left * per_epoch / workers if per_epoch is not None else None
    by_status = runs.status.value_counts().to_dict()
    failures = [(r.run_id, str(r.error or "").strip().splitlines()[-1] if r.error else "")
                for r in runs[runs.status == "failed"].itertuples()]
    running, owner = _owner(view.folder)
    if running:
        state = "running"
    elif runs.status.isin(FINAL).all():
        state = "finished"
    elif failures and not pending:
        state = "finished with failures"
    else:
        state = "stopped"
    last = segments.finished_at.max() if len(segments) else None
    return SweepStatus(
        name=view.name, folder=str(view.folder), state=state, runs_total=len(runs),
        runs_by_status={str(k): int(v) for k, v in by_status.items()},
        epochs_total=done + left + waiting, epochs_done=done,
        epochs_waiting_on_failures=waiting, seconds_per_epoch=per_epoch, workers=workers,
        eta_seconds=eta if left else 0.0, failures=failures, owner=owner,
        last_update=None if last is None or pd.isna(last) else float(last))

