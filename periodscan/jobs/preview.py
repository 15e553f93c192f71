"""``sweep --dry-run``: what a sweep would train, with and without sharing, and how long.

Nothing is written. On a folder that already holds part of the sweep, the epochs still to
train are counted against its ledger (read-only), so a resumed sweep's estimate is honest.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass

from omegaconf import DictConfig

from periodscan.engine.runner import plan_work
from periodscan.engine.segment import SegmentJob, run_segment
from periodscan.engine.tree import RunTree
from periodscan.errors import PeriodscanError
from periodscan.jobs.prepare import Prepared, prepare
from periodscan.ledger import FILE_NAME, Ledger


@dataclass(kw_only=True)
class SweepPreview:
    """Facts a dry run reports (rendered by :func:`periodscan.views.dry_run.format_preview`)."""

    prep: Prepared
    tree: RunTree
    window_runs: int
    baselines: int
    epochs_left: int  # epochs still to train in the results folder (all of them when new)
    runs_finished: int  # runs of this tree already finished in the folder
    workers: int
    seconds_per_epoch: float | None
    estimated_seconds: float | None
    first_round_only: bool  # the design decides later rounds from results


def preview(config: DictConfig | dict | Sequence[str] = (), calibrate: bool = True) -> SweepPreview:
    """Describe the sweep without training it (``calibrate`` times one trial epoch)."""
    prep = prepare(config)
    tree = prep.tree
    workers = 1 if prep.plain["executor"]["kind"] == "serial" else int(
        prep.plain["executor"].get("workers") or os.cpu_count() or 1)
    left, finished = remaining(prep)
    per_epoch = estimated = None
    if calibrate:
        per_epoch = time_one_epoch(prep)
        chain = max(tree.critical_path(r.segment_id) for r in tree.roots())
        estimated = max(left / workers, min(chain, left)) * per_epoch
    windows = sum(1 for r in tree.runs.values() if not r.is_baseline)
    return SweepPreview(prep=prep, tree=tree, window_runs=windows,
                        baselines=len(tree.runs) - windows, epochs_left=left,
                        runs_finished=finished, workers=workers, seconds_per_epoch=per_epoch,
                        estimated_seconds=estimated,
                        first_round_only=prep.design.more_rounds)


def remaining(prep: Prepared) -> tuple[int, int]:
    """(epochs still to train, runs already finished) for the tree in its results folder."""
    tree = prep.tree
    if not (prep.folder / FILE_NAME).is_file():
        return tree.epochs_shared, 0
    ledger = Ledger.read_only(prep.folder)
    try:
        if ledger.get_meta("identity") not in (None, prep.identity):
            return tree.epochs_shared, 0  # the sweep itself will refuse this folder
        needed = plan_work(tree, ledger, prep.folder).needed
        finished = len(ledger.finished_runs() & set(tree.runs))
    finally:
        ledger.close()
    return sum(tree.segments[s].epochs for s in needed), finished


def time_one_epoch(prep: Prepared) -> float:
    """Seconds of one training epoch here and now (the first of three pays warm-up)."""
    job = SegmentJob(segment_id="calibration", config=prep.training, seed=prep.seeds[0],
                     begin=0, end=3, deficit_on=False, parent_checkpoint=None,
                     keep_checkpoint=False, evaluate_at_end=False, threads=prep.threads)
    result = run_segment(job)
    if result.error:
        raise PeriodscanError(f"a trial epoch failed: {result.error.strip().splitlines()[-1]}")
    return min(e.seconds for e in result.epochs[1:])
