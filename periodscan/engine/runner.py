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
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import Any

from tqdm.auto import tqdm

from periodscan.engine import checkpoint
from periodscan.engine.records import SegmentJob, SegmentResult
from periodscan.engine.tree import RunTree
from periodscan.ledger import Ledger
from periodscan.monitors import Monitor, build_monitor

CHECKPOINT_DIR = "checkpoints"
MAX_WORKER_RETRIES = 2
#: Outcomes of a segment, as ``execute`` counts them (see ``SegmentResult.status``).
STATUSES = ("done", "failed", "diverged")
#: Test hook: SIGKILL the sweep process at a named point, e.g. ``before-ledger:3`` (when the
#: third segment result is being recorded: checkpoint renamed into place, ledger not written),
#: ``before-checkpoint:N``, ``after-ledger:N`` or ``before-outputs``. Used by tests/test_resume.py.
KILL_ENV = "PERIODSCAN_TEST_KILL_AT"


def kill_point(point: str) -> None:
    """SIGKILL this process if ``PERIODSCAN_TEST_KILL_AT`` names ``point`` (tests only)."""
    if os.environ.get(KILL_ENV) == point:
        os.kill(os.getpid(), signal.SIGKILL)


@dataclass(kw_only=True)
class Plan:
    """The segments still to train and where each one's parent state comes from."""

    needed: set[str]
    available: dict[str, Path]  # verified checkpoints on disk that needed segments start from


def plan_work(tree: RunTree, ledger: Ledger, folder: Path) -> Plan:
    """Walk up from every unfinished run until a verified checkpoint (or the root)."""
    finished = ledger.finished_runs()
    stored = ledger.checkpoints()
    verified: dict[str, bool] = {}  # segment id -> its checkpoint is on disk and intact
    needed: set[str] = set()
    for run_id, path in tree.paths.items():
        if run_id in finished:
            continue
        for depth in range(len(path) - 1, -1, -1):
            sid = path[depth]
            if sid in needed:
                break
            if depth < len(path) - 1 and _usable(sid, stored, folder, verified):
                break
            needed.add(sid)
    available = {sid: folder / stored[sid][0] for sid, ok in verified.items() if ok}
    return Plan(needed=needed, available=available)


def _usable(sid: str, stored: dict[str, tuple[str, str]], folder: Path,
            verified: dict[str, bool]) -> bool:
    """Is ``sid``'s recorded checkpoint on disk with its recorded hash? (memoised in verified)"""
    if sid not in verified:
        name, digest = stored.get(sid, (None, None))
        ok = name is not None and (folder / name).is_file()
        if ok and checkpoint.read_verified(folder / name, digest) is None:
            warnings.warn(f"checkpoint {name} does not match its recorded sha256 "
                          "(truncated or corrupted); training that segment again", stacklevel=3)
            ok = False
        verified[sid] = ok
    return verified[sid]


@dataclass(kw_only=True)
class Scheduler:
    """One ``execute`` call: what it trains with, and where every needed segment stands.

    A segment id is in exactly one of ``waiting`` (not submitted, or to be retried) and
    ``running`` (submitted, result not yet collected) until its result is recorded.
    """

    tree: RunTree
    ledger: Ledger
    folder: Path
    training: dict[str, Any]
    threads: int
    monitor: dict[str, Any] | None  # the monitor config every probed job carries
    probe: Monitor | None  # the same monitor built here, to read where it probes
    variants: dict[str, dict[str, Any]]  # deficit block of each variant key (see RunSpec)
    plan: Plan
    chain: dict[str, int]  # epochs on the longest chain from each segment down to a leaf
    bar: tqdm  # progress in epochs
    waiting: set[str]
    counts: dict[str, int]  # segments recorded, by status
    running: dict[Any, str] = field(default_factory=dict)  # future -> segment id
    retries: dict[str, int] = field(default_factory=dict)  # worker deaths per segment
    blobs: dict[str, bytes] = field(default_factory=dict)  # parents held for unsent children
    received: int = 0  # results collected so far (numbers the kill points)


def execute(tree: RunTree, ledger: Ledger, folder: Path, training: dict[str, Any],
            executor, threads: int, quiet: bool = False,
            monitor: dict[str, Any] | None = None,
            variants: dict[str, dict[str, Any]] | None = None) -> dict[str, int]:
    """Train every needed segment; return counts of segments done, failed and diverged.

    ``monitor`` (the ``_target_`` config of a :class:`periodscan.monitors.Monitor`) probes
    the clean trunk, and deficit runs too when the monitor's ``on_windows`` is true.
    ``variants`` maps each deficit variant key of the tree to the deficit block its segments
    train with in place of ``training["deficit"]``.
    """
    state = start(tree, ledger, folder, training, threads, monitor, quiet, variants)
    try:
        while state.waiting or state.running:
            submit_ready(state, executor)
            if not state.running:
                break  # what is left hangs below a failed segment
            for future in executor.wait_first(state.running):
                result = collect_result(state, future, executor.isolate_retries)
                if result is not None:
                    record_result(state, result)
    finally:
        state.bar.close()
    return state.counts


def start(tree: RunTree, ledger: Ledger, folder: Path, training: dict[str, Any], threads: int,
          monitor: dict[str, Any] | None, quiet: bool,
          variants: dict[str, dict[str, Any]] | None = None) -> Scheduler:
    """Plan the work, build the monitor once (to read its settings), open the progress bar."""
    plan = plan_work(tree, ledger, folder)
    probe = build_monitor(monitor)
    total = sum(tree.segments[s].epochs for s in plan.needed)
    bar = tqdm(total=total, unit="epoch", desc="sweep", disable=quiet or total == 0,
               dynamic_ncols=True, smoothing=0.1)
    return Scheduler(tree=tree, ledger=ledger, folder=folder, training=training,
                     threads=threads, monitor=monitor if probe is not None else None,
                     probe=probe, variants=dict(variants or {}), plan=plan,
                     chain={sid: tree.critical_path(sid) for sid in plan.needed},
                     bar=bar, waiting=set(plan.needed), counts=dict.fromkeys(STATUSES, 0))


def ready_segments(state: Scheduler) -> list[str]:
    """Waiting segments whose parent state is at hand, most urgent first."""
    ready = [sid for sid in state.waiting if parent_at_hand(state, sid)]
    return sorted(ready, key=partial(urgency, state))


def parent_at_hand(state: Scheduler, sid: str) -> bool:
    """A root, or a segment whose parent checkpoint is in memory or verified on disk."""
    parent = state.tree.segments[sid].parent
    return parent is None or parent in state.blobs or parent in state.plan.available


def urgency(state: Scheduler, sid: str) -> tuple:
    """Sort key: longest chain of epochs below first; ties: clean trunk, seed, begin, id."""
    seg = state.tree.segments[sid]
    return -state.chain[sid], seg.deficit_on, seg.seed, seg.begin, sid


def to_submit(state: Scheduler, executor, ready: list[str]) -> list[str]:
    """Fill free slots; after a pool-breaking worker death, retry lost segments alone."""
    if executor.isolate_retries:
        if any(state.retries.get(s) for s in state.running.values()):
            return []
        retried = [s for s in ready if state.retries.get(s)]
        if retried:
            return [] if state.running else retried[:1]
    return ready[: max(executor.in_flight - len(state.running), 0)]


def submit_ready(state: Scheduler, executor) -> None:
    """Send as many ready segments as the executor takes, most urgent first."""
    for sid in to_submit(state, executor, ready_segments(state)):
        state.waiting.discard(sid)
        state.running[executor.submit(make_job(state, sid))] = sid


def make_job(state: Scheduler, sid: str) -> SegmentJob:
    """The job that trains segment ``sid`` from its parent's checkpoint bytes."""
    seg = state.tree.segments[sid]
    blob = None
    if seg.parent is not None:
        blob = state.blobs.get(seg.parent)
        if blob is None:
            blob = state.plan.available[seg.parent].read_bytes()
    probed = monitored(state.tree, sid, state.probe)
    return SegmentJob(segment_id=sid, config=job_config(state, seg.variant), seed=seg.seed,
                      begin=seg.begin, end=seg.end, deficit_on=seg.deficit_on,
                      parent_checkpoint=blob,
                      keep_checkpoint=bool(seg.children), evaluate_at_end=bool(seg.finishes),
                      threads=state.threads, monitor=state.monitor if probed else None)


def job_config(state: Scheduler, variant: str) -> dict[str, Any]:
    """The training config of a segment: the variant's deficit block in place of the config's."""
    if not variant:
        return state.training
    return {**state.training, "deficit": state.variants[variant]}


def collect_result(state: Scheduler, future, isolated: bool = False) -> SegmentResult | None:
    """The finished segment's result; None when its worker died and it goes back to wait.

    A segment whose worker dies more than ``MAX_WORKER_RETRIES`` times comes back failed. With
    ``isolated`` retries (a pool that breaks as a whole), the first loss is not counted: it
    may have been another segment's death, and only the retries, run alone, say whose it was.
    """
    sid = state.running.pop(future)
    try:
        return future.result()
    except Exception as err:  # noqa: BLE001 - a worker process died
        state.retries[sid] = state.retries.get(sid, 0) + 1
        deaths = state.retries[sid] - 1 if isolated else state.retries[sid]
        if deaths <= MAX_WORKER_RETRIES:
            state.waiting.add(sid)
            return None
        why = (str(err).strip().splitlines() or [""])[0]
        alone = " while running alone" if isolated else ""
        return SegmentResult(
            segment_id=sid,
            error=f"worker lost {deaths} times{alone}: {type(err).__name__}: {why}")


def record_result(state: Scheduler, result: SegmentResult) -> None:
    """Store the result (checkpoint file, then ledger rows), count it, free what it allows.

    The kill points bracket each write, so tests can stop the process between any two.
    """
    state.received += 1
    kill_point(f"before-checkpoint:{state.received}")
    name, digest = store_checkpoint(state, result)
    kill_point(f"before-ledger:{state.received}")
    store_in_ledger(state, result, name, digest)
    kill_point(f"after-ledger:{state.received}")
    state.counts[result.status] += 1
    state.bar.update(state.tree.segments[result.segment_id].epochs)
    if result.status != "done":
        drop_below(state, result.segment_id)
    _release(state.tree, state.blobs, state.waiting | set(state.running.values()))


def store_checkpoint(state: Scheduler, result: SegmentResult) -> tuple[str | None, str | None]:
    """Write the end checkpoint atomically and hold it for the children; (file, sha256)."""
    if result.checkpoint is None:
        return None, None
    name = f"{CHECKPOINT_DIR}/{result.segment_id}.pt"
    digest = checkpoint.sha256(result.checkpoint)
    checkpoint.write_atomic(state.folder / name, result.checkpoint)
    state.blobs[result.segment_id] = result.checkpoint
    return name, digest


def store_in_ledger(state: Scheduler, result: SegmentResult, name: str | None,
                    digest: str | None) -> None:
    """The segment's ledger rows, then the outcome of the unfinished runs below a failure."""
    sid, ledger = result.segment_id, state.ledger
    ledger.record_segment(result, name, digest, state.tree.segments[sid].finishes, state.threads)
    if result.status == "done":
        return
    # A grown design can route an already finished run through a new segment: keep it.
    finished = ledger.finished_runs()
    below = [rid for rid, path in state.tree.paths.items()
             if sid in path and rid not in finished]
    if result.status == "failed":
        ledger.mark_runs(below, "failed", error=error_line(result.error))
    else:
        ledger.mark_runs(below, "diverged", diverged_at=result.diverged_at, acc=result.test_acc,
                         loss=result.test_loss, n_test=result.n_test, correct=result.correct)


def drop_below(state: Scheduler, sid: str) -> None:
    """Stop waiting for the segments below a failed or diverged one; shrink the bar to match."""
    dropped = (_subtree(state.tree, sid) - {sid}) & state.waiting
    state.waiting -= dropped
    state.bar.total -= sum(state.tree.segments[s].epochs for s in dropped)
    state.bar.refresh()


def error_line(trace: str) -> str:
    """The ``SomeError: message`` line of a formatted traceback (its last line otherwise)."""
    lines = trace.strip().splitlines()
    for line in reversed(lines):
        if re.match(r"[A-Za-z_][\w.]*: ", line):
            return line
    return lines[-1] if lines else trace


def monitored(tree: RunTree, sid: str, probe: Monitor | None) -> bool:
    """Clean-trunk segments always; segments at or below a deficit if ``probe.on_windows``."""
    if probe is None:
        return False
    if probe.on_windows:
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
