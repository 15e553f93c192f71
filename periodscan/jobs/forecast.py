"""The ``forecast`` job: train only the clean trunks with the Fisher monitor, predict the
critical window.

A forecast costs the trunks alone (one clean run per seed) instead of the whole sweep. It
trains in the sweep's own results folder, with the sweep's segment ids and checkpoints, so a
later ``periodscan sweep`` of the same config reuses the trunks and trains only the branches.
Trunks already trained there without the monitor are replayed (training is deterministic, so
the replay reproduces them exactly) to obtain their readings. The rule that turns the Fisher
curve into a window is in :mod:`periodscan.fisher.rule`; the text in
:mod:`periodscan.views.forecast`.
"""

from __future__ import annotations

import dataclasses
import os
import time
import warnings
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd
from omegaconf import DictConfig, OmegaConf

from periodscan.config import config_dir
from periodscan.engine.runner import plan_work
from periodscan.engine.segment import SegmentJob
from periodscan.engine.tree import RunTree
from periodscan.errors import SweepError
from periodscan.fisher.rule import Phase, critical_phase, mean_curve, window_scores
from periodscan.jobs.folder import JobFolder
from periodscan.jobs.prepare import Prepared, prepare
from periodscan.ledger import Ledger
from periodscan.monitors import TOTAL, monitor_every
from periodscan.params import Interval, check_value

SCORES_CSV = "forecast.csv"


@dataclass
class ForecastOutcome:
    """What ``forecast`` hands back: the prediction, the readings and what it cost."""

    folder: Path
    phase: Phase
    scores: pd.DataFrame  # start, length, score, overlap, at_risk: one row per design window
    curve: pd.DataFrame  # epoch, trace: mean over seeds of fisher/total
    readings: pd.DataFrame  # seed, epoch, name, value: every fisher/* reading of the trunks
    seeds: list[int]
    seconds: float  # wall time of this call
    epochs_trained: int  # trunk epochs trained (or replayed) by this call
    seconds_per_epoch: float  # wall seconds per trunk epoch measured in the workers
    sweep_epochs: int  # epochs the full sweep trains with sharing
    sweep_seconds: float  # estimated wall time of the full sweep from scratch
    remaining_epochs: int  # epochs the sweep still has to train in this folder
    remaining_seconds: float  # estimated wall time of those epochs
    workers: int


def forecast(config: DictConfig | dict | Sequence[str] = (), seeds: int | None = None,
             quiet: bool = False, command: str | None = None) -> ForecastOutcome:
    """Train (or reuse) the clean trunks with the Fisher monitor and predict the critical window.

    Parameters
    ----------
    config : composed config, plain dict or Hydra override strings
        The sweep to forecast; its folder, seeds and windows are used. Without a monitor
        configured, ``monitor=fisher`` with its defaults is used.
    seeds : int, optional
        Use only the first ``seeds`` seeds of the config (all by default).
    quiet : bool
        No progress bar.
    command : str, optional
        The shell command, recorded in the ledger with the forecast.
    """
    started = time.perf_counter()
    prep = prepare(config)
    chosen = _choose_seeds(prep.seeds, seeds)
    monitor = _fisher_monitor(prep.plain.get("monitor"))
    trunks = trunk_tree(prep.tree, chosen)
    with JobFolder(prep, command=command, quiet=quiet, write_config=False) as job:
        trained = _train_trunks(job, trunks, monitor)
        job.close_executor()
        left = sum(prep.tree.segments[sid].epochs
                   for sid in plan_work(prep.tree, job.ledger, prep.folder).needed)
        outcome = _predict(prep, chosen, trunk_readings(job.ledger, trunks),
                           _seconds_per_epoch(job.ledger, trunks), left)
        outcome.epochs_trained = trained
        outcome.seconds = time.perf_counter() - started
        _save(job, outcome, command)
    return outcome


def _train_trunks(job: JobFolder, trunks: RunTree, monitor: dict[str, Any]) -> int:
    """Train the trunks with the monitor (replaying finished ones that lack readings)."""
    needed = plan_work(trunks, job.ledger, job.folder).needed
    counts = job.train(trunks, monitor=monitor)
    if counts["failed"]:
        raise SweepError(f"{counts['failed']} trunk segment(s) failed; see the ledger in "
                         f"{job.folder} (periodscan status)")
    trained = sum(trunks.segments[sid].epochs for sid in needed)
    missing = _seeds_without_readings(job.ledger, trunks, monitor)
    return trained + _replay(trunks, job, missing, monitor)


def trunk_tree(tree: RunTree, seeds: Sequence[int]) -> RunTree:
    """The clean trunks of ``seeds``: baseline runs and the segments on their paths.

    Segments keep their ids, epochs and their clean children, so checkpoints are stored at the
    same epochs as in the full sweep, and the sweep later forks its branches from them.
    """
    runs = {rid: r for rid, r in tree.runs.items() if r.is_baseline and r.seed in seeds}
    keep = {sid for rid in runs for sid in tree.paths[rid]}
    segments = {
        sid: dataclasses.replace(
            seg, children=[c for c in seg.children if c in keep],
            finishes=[r for r in seg.finishes if r.run_id in runs])
        for sid, seg in tree.segments.items() if sid in keep
    }
    return RunTree(segments=segments, paths={rid: tree.paths[rid] for rid in runs}, runs=runs)


def trunk_readings(ledger: Ledger, trunks: RunTree) -> pd.DataFrame:
    """Every ``fisher/*`` reading along each seed's longest baseline: seed, epoch, name, value."""
    longest = _longest_baselines(trunks)
    extras = ledger.extras_frame()
    mine = extras[extras.run_id.isin(longest) & extras.name.str.startswith("fisher/")]
    return mine[["seed", "epoch", "name", "value"]].sort_values(["seed", "name", "epoch"]) \
        .reset_index(drop=True)


def _choose_seeds(seeds: list[int], count: int | None) -> list[int]:
    if count is None:
        return seeds
    check_value("--seeds", count, [Interval(int, 1, len(seeds))])
    return seeds[:count]


def _fisher_monitor(settings: dict[str, Any] | None) -> dict[str, Any]:
    """The configured monitor, or ``configs/monitor/fisher.yaml`` when none is set."""
    if settings and settings.get("_target_"):
        return settings
    default = OmegaConf.load(Path(config_dir()) / "monitor" / "fisher.yaml")
    return OmegaConf.to_container(default, resolve=True)


def _longest_baselines(trunks: RunTree) -> dict[str, Any]:
    """run_id -> RunSpec of the baseline that trains furthest, one per seed."""
    best: dict[int, Any] = {}
    for run in trunks.runs.values():
        if run.seed not in best or run.end > best[run.seed].end:
            best[run.seed] = run
    return {r.run_id: r for r in best.values()}


def _seeds_without_readings(ledger: Ledger, trunks: RunTree, monitor: dict) -> list[int]:
    """Seeds whose finished trunk lacks a ``fisher/total`` reading at some probed epoch."""
    readings = trunk_readings(ledger, trunks)
    totals = readings[readings.name == TOTAL]
    every = monitor_every(monitor)
    finished = ledger.finished_runs()
    missing = []
    for run_id, run in _longest_baselines(trunks).items():
        have = set(totals[totals.seed == run.seed].epoch)
        if run_id in finished and not set(range(0, run.end, every)) <= have:
            missing.append(run.seed)
    return missing


def _replay(trunks: RunTree, job: JobFolder, seeds: list[int], monitor: dict) -> int:
    """Retrain the trunks of ``seeds`` in memory with the monitor and store only the readings.

    The replay is checked against the stored learning curve: identical held-out accuracy at
    every epoch, or the readings are not stored.
    """
    if not seeds:
        return 0
    longest = {r.seed: (rid, r) for rid, r in _longest_baselines(trunks).items()}
    jobs = {job.executor.submit(SegmentJob(
        segment_id=f"fisher-replay-{seed}", config=job.prep.training, seed=seed, begin=0,
        end=longest[seed][1].end, deficit_on=False, parent_checkpoint=None,
        keep_checkpoint=False, evaluate_at_end=False, threads=job.prep.threads,
        monitor=monitor)): seed for seed in seeds}
    stored = job.ledger.epochs_frame()
    pending = set(jobs)
    while pending:
        for future in job.executor.wait_first(pending):
            pending.discard(future)
            seed = jobs[future]
            result = future.result()
            run_id, run = longest[seed]
            if result.error:
                raise SweepError(f"replaying the trunk of seed {seed} failed: "
                                 f"{result.error.strip().splitlines()[-1]}")
            curve = stored[stored.run_id == run_id].set_index("epoch").test_acc
            replayed = {e.epoch: e.test_acc for e in result.epochs}
            if any(curve.get(e) != acc for e, acc in replayed.items()):
                warnings.warn(f"the replayed trunk of seed {seed} differs from the stored one; "
                              "its Fisher readings are not stored", stacklevel=3)
                continue
            owner = {e: sid for sid in trunks.paths[run_id]
                     for e in range(trunks.segments[sid].begin, trunks.segments[sid].end)}
            job.ledger.record_extras(
                [(owner[epoch], epoch, name, value) for epoch, name, value in result.extras])
    return sum(longest[s][1].end for s in seeds)


def _seconds_per_epoch(ledger: Ledger, trunks: RunTree) -> float:
    """Wall seconds per epoch of the trunk segments, as the workers measured them.

    Includes what every segment pays besides training (building the model, loading and
    writing checkpoints) and, on trunks, the monitor's probe, so it errs slightly high.
    """
    segments = ledger.segments_frame()
    mine = segments[segments.segment_id.isin(trunks.segments) & (segments.status == "done")]
    epochs = (mine.end_epoch - mine.begin_epoch).sum()
    return float(mine.seconds.sum() / epochs) if epochs else float("nan")


def _predict(prep: Prepared, seeds: list[int], readings: pd.DataFrame, per_epoch: float,
             left: int) -> ForecastOutcome:
    """Apply the rule; ``left`` is the number of epochs the sweep still has to train."""
    epochs = int(prep.plain["schedule"]["epochs"])
    totals = readings[readings.name == TOTAL]
    if totals.empty:
        raise SweepError("the monitor recorded no 'fisher/total' readings; use monitor=fisher "
                         "(or a monitor that records fisher/total)")
    span = max(r.end for r in prep.tree.runs.values() if r.is_baseline)
    curve = mean_curve(totals, span)
    phase = critical_phase(curve, epochs=epochs)
    windows = sorted({(r.start, r.length) for r in prep.tree.runs.values() if not r.is_baseline})
    scores = window_scores(curve, windows, phase)
    workers = _workers(prep.plain["executor"])
    tree = prep.tree
    chain = max(tree.critical_path(r.segment_id) for r in tree.roots())
    sweep_seconds = max(tree.epochs_shared / workers, chain) * per_epoch
    return ForecastOutcome(
        folder=prep.folder, phase=phase, scores=scores,
        curve=pd.DataFrame({"epoch": range(len(curve)), "trace": curve}),
        readings=readings, seeds=list(seeds), seconds=0.0, epochs_trained=0,
        seconds_per_epoch=per_epoch, sweep_epochs=tree.epochs_shared,
        sweep_seconds=sweep_seconds, remaining_epochs=left,
        remaining_seconds=left / workers * per_epoch, workers=workers)


def _workers(executor: dict[str, Any]) -> int:
    if executor.get("kind") == "serial":
        return 1
    return int(executor.get("workers") or os.cpu_count() or 1)


def _save(job: JobFolder, outcome: ForecastOutcome, command: str | None) -> None:
    """Per-window scores as CSV, the predicted window in the ledger's meta table."""
    job.write(SCORES_CSV, outcome.scores.to_csv(index=False, float_format="%.5f").encode())
    ledger = job.ledger
    phase = outcome.phase
    ledger.set_meta(forecast={
        "begin": phase.begin, "end": phase.end, "peak": phase.peak, "epochs": phase.epochs,
        "seeds": outcome.seeds, "seconds": outcome.seconds, "command": command,
        "created": time.time()})
