"""Run a planned tree: schedule ready segments on an executor, record every result.

A segment is ready when its parent's checkpoint exists. Ready segments go out longest-chain
first, at most ``executor.in_flight`` at a time (one queued behind each busy worker, so workers
never wait on this process's bookkeeping). Each finished segment is recorded in one ledger
transaction, after its checkpoint file has been written and renamed into place, so a rerun of
a killed sweep skips every run already done and restarts from the deepest verified checkpoint.
A checkpoint on disk without its ledger row (killed in between) is simply trained again; a
ledger row naming a checkpoint that is not there cannot happen.

A worker that dies is retried ``MAX_WORKER_RETRIES`` times; a segment that raises is recorded
as failed with its error, the runs below it are marked failed, and the rest of the sweep goes on.
"""

from __future__ import annotations

import os
import re
import signal
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from tqdm.auto import tqdm

from periodscan.engine import checkpoint
from periodscan.engine.segment import SegmentJob, SegmentResult
from periodscan.engine.tree import RunTree
from periodscan.ledger import Ledger

CHECKPOINT_DIR = "checkpoints"
MAX_WORKER_RETRIES = 2
#: Test hook: SIGKILL the sweep process at a named point, e.g. ``before-ledger:3`` (when the
#: third segment result is being recorded: checkpoint renamed into place, ledger not written),
#: ``before-checkpoint:N``, ``after-ledger:N`` or ``before-outputs``. Used by tests/test_resume.py.
KILL_ENV = "PERIODSCAN_TEST_KILL_AT"


def kill_point(point: str) -> None:
    """SIGKILL this process if ``PERIODSCAN_TEST_KILL_AT`` names ``point`` (tests only)."""
    if os.environ.get(KILL_ENV) == point:
        os.kill(os.getpid(), signal.SIGKILL)


@dataclass
class Plan:
    """The segments still to train and where each one's parent state comes from."""

    needed: set[str]
    available: dict[str, Path]  # verified checkpoints on disk that needed segments start from


def plan_work(tree: RunTree, ledger: Ledger, folder: Path) -> Plan:
    """Walk up from every unfinished run until a verified checkpoint (or the root)."""
    finished = ledger.finished_runs()
    stored = ledger.checkpoints()
    verified: dict[str, bool] = {}

    def usable(sid: str) -> bool:
        if sid not in verified:
            name, digest = stored.get(sid, (None, None))
            ok = name is not None and (folder / name).is_file()
            if ok and checkpoint.read_verified(folder / name, digest) is None:
                warnings.warn(f"checkpoint {name} does not match its recorded sha256 "
                              "(truncated or corrupted); training that segment again",
                              stacklevel=2)
                ok = False
            verified[sid] = ok
        return verified[sid]

    needed: set[str] = set()
    for run_id, path in tree.paths.items():
        if run_id in finished:
            continue
        for depth in range(len(path) - 1, -1, -1):
            sid = path[depth]
            if sid in needed:
                break
            if depth < len(path) - 1 and usable(sid):
                break
            needed.add(sid)
    available = {sid: folder / stored[sid][0] for sid, ok in verified.items() if ok}
    return Plan(needed, available)


def execute(tree: RunTree, ledger: Ledger, folder: Path, training: dict[str, Any],
            executor, threads: int, quiet: bool = False,
            monitor: dict[str, Any] | None = None) -> dict[str, int]:
    """Train every needed segment; return counts of segments done, failed and diverged.

    ``monitor`` (a ``_target_`` config) probes every epoch of the clean trunk, and of deficit
    runs too when it says ``on_windows: true``.
    """
    plan = plan_work(tree, ledger, folder)
    blobs: dict[str, bytes] = {}  # parent checkpoints held for children not yet submitted
    chain = {sid: tree.critical_path(sid) for sid in plan.needed}

    def parent_ready(sid: str) -> bool:
        parent = tree.segments[sid].parent
        return parent is None or parent in blobs or parent in plan.available

    def make_job(sid: str) -> SegmentJob:
        seg = tree.segments[sid]
        blob = None
        if seg.parent is not None:
            blob = blobs.get(seg.parent)
            if blob is None:
                blob = plan.available[seg.parent].read_bytes()
        probe = monitor if _monitored(tree, sid, monitor) else None
        return SegmentJob(segment_id=sid, config=training, seed=seg.seed, begin=seg.begin,
                          end=seg.end, deficit_on=seg.deficit_on, parent_checkpoint=blob,
                          keep_checkpoint=bool(seg.children), evaluate_at_end=bool(seg.finishes),
                          threads=threads, monitor=probe)

    def priority(sid: str) -> tuple:
        """Longest chain of epochs below first; ties: clean trunk first, then by id (stable)."""
        seg = tree.segments[sid]
        return -chain[sid], seg.deficit_on, seg.seed, seg.begin, sid

    waiting = set(plan.needed)
    running: dict[Any, str] = {}
    retries: dict[str, int] = {}
    counts = {"done": 0, "failed": 0, "diverged": 0}
    received = 0
    total = sum(tree.segments[s].epochs for s in plan.needed)
    bar = tqdm(total=total, unit="epoch", desc="sweep", disable=quiet or total == 0,
               dynamic_ncols=True, smoothing=0.1)

    def to_submit(ready: list[str]) -> list[str]:
        """Fill free slots; after a pool-breaking worker death, retry lost segments alone."""
        if executor.isolate_retries:
            if any(retries.get(s) for s in running.values()):
                return []
            retried = [s for s in ready if retries.get(s)]
            if retried:
                return [] if running else retried[:1]
        return ready[: max(executor.in_flight - len(running), 0)]

    try:
        while waiting or running:
            ready = sorted((s for s in waiting if parent_ready(s)), key=priority)
            for sid in to_submit(ready):
                waiting.discard(sid)
                running[executor.submit(make_job(sid))] = sid
            if not running:
                break  # what is left hangs below a failed segment
            for future in executor.wait_first(running):
                sid = running.pop(future)
                try:
                    result: SegmentResult = future.result()
                except Exception as err:  # noqa: BLE001 - a worker process died
                    retries[sid] = retries.get(sid, 0) + 1
                    if retries[sid] <= MAX_WORKER_RETRIES:
                        waiting.add(sid)
                        continue
                    why = (str(err).strip().splitlines() or [""])[0]
                    result = SegmentResult(
                        segment_id=sid,
                        error=f"worker lost {retries[sid]} times: {type(err).__name__}: {why}")
                received += 1
                kill_point(f"before-checkpoint:{received}")
                _record(tree, ledger, folder, result, threads, blobs, received)
                kill_point(f"after-ledger:{received}")
                status = ("failed" if result.error else
                          "diverged" if result.diverged_at is not None else "done")
                counts[status] += 1
                bar.update(tree.segments[sid].epochs)
                if status != "done":
                    dropped = (_subtree(tree, sid) - {sid}) & waiting
                    waiting -= dropped
                    bar.total -= sum(tree.segments[s].epochs for s in dropped)
                    bar.refresh()
                _release(tree, blobs, waiting | set(running.values()))
    finally:
        bar.close()
    return counts


def _record(tree: RunTree, ledger: Ledger, folder: Path, result: SegmentResult, threads: int,
            blobs: dict[str, bytes], count: int = 0) -> None:
    """Write the checkpoint (atomically), then the ledger rows, then mark runs below failures."""
    sid = result.segment_id
    seg = tree.segments[sid]
    name = digest = None
    if result.checkpoint is not None:
        name = f"{CHECKPOINT_DIR}/{sid}.pt"
        digest = checkpoint.sha256(result.checkpoint)
        checkpoint.write_atomic(folder / name, result.checkpoint)
        blobs[sid] = result.checkpoint
    kill_point(f"before-ledger:{count}")
    ledger.record_segment(result, name, digest, seg.finishes, threads)
    below = [rid for rid, path in tree.paths.items() if sid in path]
    if result.error or result.diverged_at is not None:
        # A grown design can route an already finished run through a new segment: keep it.
        finished = ledger.finished_runs()
        below = [rid for rid in below if rid not in finished]
    if result.error:
        ledger.mark_runs(below, "failed", error=error_line(result.error))
    elif result.diverged_at is not None:
        ledger.mark_runs(below, "diverged", diverged_at=result.diverged_at, acc=result.test_acc,
                         loss=result.test_loss, n_test=result.n_test, correct=result.correct)


def error_line(trace: str) -> str:
    """The ``SomeError: message`` line of a formatted traceback (its last line otherwise)."""
    lines = trace.strip().splitlines()
    for line in reversed(lines):
        if re.match(r"[A-Za-z_][\w.]*: ", line):
            return line
    return lines[-1] if lines else trace


def _monitored(tree: RunTree, sid: str, monitor: dict[str, Any] | None) -> bool:
    """Clean-trunk segments always; segments at or below a deficit only if asked."""
    if not monitor or not monitor.get("_target_"):
        return False
    if monitor.get("on_windows", False):
        return True
    return not any(tree.segments[a].deficit_on for a in tree.ancestors(sid))


def _subtree(tree: RunTree, sid: str) -> set[str]:
    out, stack = set(), [sid]
    while stack:
        current = stack.pop()
        out.add(current)
        stack.extend(tree.segments[current].children)
    return out


def _release(tree: RunTree, blobs: dict[str, bytes], pending: set[str]) -> None:
    """Drop in-memory checkpoints whose children have all been submitted."""
    for sid in list(blobs):
        if not any(c in pending for c in tree.segments[sid].children):
            del blobs[sid]
