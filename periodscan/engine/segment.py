"""Train one segment of the run tree: a pure function from (config, parent checkpoint) to result.

This is the unit of work every executor ships to a worker (a local process or a cluster node).
It takes and returns plain picklable values, checkpoints as bytes, so no shared file system is
needed, and it sets torch's thread count and device itself, because both change the numbers.
"""

from __future__ import annotations

import json
import time
import traceback
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from hydra.utils import instantiate

from periodscan.data.base import TensorData
from periodscan.data.stream import StreamData
from periodscan.deficits.base import Deficit
from periodscan.engine import checkpoint
from periodscan.engine.device import use_device
from periodscan.engine.records import EpochRecord, SegmentJob, SegmentResult
from periodscan.engine.schedule import build_lr_scheduler, build_optimizer
from periodscan.engine.training import EVAL_BATCH, evaluate_batches, prepare_deficit, train_epoch
from periodscan.monitors import build_monitor
from periodscan.seeding import ONCE, derive_seed
from periodscan.steps import Step, build_step

_DATA_CACHE: dict[str, TensorData | StreamData] = {}


def load_data(data_config: dict[str, Any]) -> TensorData | StreamData:
    """Build the dataset once per process; workers reuse it across segments.

    Streamed data keeps its loader worker processes for as long as it stays here.
    """
    key = json.dumps(data_config, sort_keys=True, default=str)
    if key not in _DATA_CACHE:
        _DATA_CACHE.clear()
        _DATA_CACHE[key] = instantiate(data_config)
    return _DATA_CACHE[key]


def build_model(config: dict[str, Any], data: TensorData, seed: int) -> torch.nn.Module:
    """Instantiate the model with initial weights that depend only on the seed."""
    torch.manual_seed(derive_seed(seed, ONCE, "init"))
    return instantiate(config["model"], input_shape=data.input_shape, num_classes=data.num_classes)


@dataclass
class Learner:
    """The model and what updates it; a checkpoint saves and restores all but the step."""

    model: torch.nn.Module
    optimizer: torch.optim.Optimizer
    lr_scheduler: torch.optim.lr_scheduler.LRScheduler | None
    step: Step


def build_learner(config: dict[str, Any], data: TensorData, seed: int) -> Learner:
    """Model (seeded initial weights, on this worker's device), optimizer, scheduler, step."""
    device = use_device(config.get("device"))
    model = build_model(config, data, seed).to(device)
    optimizer = build_optimizer(model.parameters(), config["schedule"])
    return Learner(model=model, optimizer=optimizer,
                   lr_scheduler=build_lr_scheduler(optimizer, config["schedule"]),
                   step=build_step(config.get("step")))


def run_segment(job: SegmentJob) -> SegmentResult:
    """Train the segment; errors come back as data, so one bad run never stops a sweep."""
    started = time.perf_counter()
    try:
        result = _train(job)
    except Exception:  # noqa: BLE001 - recorded in the ledger, shown by status/report
        result = SegmentResult(segment_id=job.segment_id, error=traceback.format_exc(limit=8))
    result.seconds = time.perf_counter() - started
    return result


def _train(job: SegmentJob) -> SegmentResult:
    torch.set_num_threads(job.threads)
    config = job.config
    data = load_data(config["data"])
    learner = build_learner(config, data, job.seed)
    if job.parent_checkpoint is not None:
        state = checkpoint.from_bytes(job.parent_checkpoint)
        if state["epoch"] != job.begin:
            raise RuntimeError(f"parent checkpoint is at epoch {state['epoch']}, need {job.begin}")
        checkpoint.restore(state, learner.model, learner.optimizer, learner.lr_scheduler)
    deficit = _deficit(config, data, job.seed) if job.deficit_on else None

    result = SegmentResult(segment_id=job.segment_id)
    probe = _probe(job.monitor, data, job.seed, result.extras)
    result.epochs, final, result.diverged_at = train_epochs(
        learner.model, learner.optimizer, data, config["schedule"], job.seed,
        range(job.begin, job.end), lambda epoch: deficit, after_epoch=probe,
        step=learner.step, lr_scheduler=learner.lr_scheduler,
    )
    if job.evaluate_at_end or result.diverged_at is not None:
        result.test_acc, result.test_loss = final.acc, final.loss
        result.correct = np.packbits(final.correct.numpy()).tobytes()
        result.n_test = len(final.correct)
    if job.keep_checkpoint and result.diverged_at is None:
        result.checkpoint = checkpoint.to_bytes(learner.model, learner.optimizer, job.end,
                                                learner.lr_scheduler)
    return result


def _deficit(config: dict[str, Any], data: TensorData, seed: int) -> Deficit:
    deficit = instantiate(config["deficit"])
    prepare_deficit(deficit, data, seed)
    return deficit


def _probe(settings: dict[str, Any] | None, data: TensorData, seed: int,
           sink: list[tuple[int, str, float]]) -> Callable[[torch.nn.Module, int], None] | None:
    """The job's monitor as a per-epoch probe; readings go to ``sink`` as (epoch, name, value).

    The probe calls the monitor on the epochs its ``every`` selects; the contract a monitor
    keeps is on :class:`periodscan.monitors.Monitor`.
    """
    monitor = build_monitor(settings)
    if monitor is None:
        return None

    def probe(model: torch.nn.Module, epoch: int) -> None:
        if epoch % monitor.every == 0:
            for name, value in monitor(model, data, seed, epoch).items():
                sink.append((epoch, name, float(value)))

    return probe


def train_epochs(model, optimizer, data: TensorData, schedule: dict[str, Any], seed: int,
                 epochs: range, deficit_at: Callable[[int], Deficit | None],
                 after_epoch: Callable[[torch.nn.Module, int], None] | None = None,
                 step: Step | None = None, lr_scheduler=None):
    """Train ``epochs`` in order, evaluating after each; stop at the first non-finite loss.

    Returns (epoch records, evaluation after the last trained epoch, diverged epoch or None).
    """
    records: list[EpochRecord] = []
    held_out = None
    for epoch in epochs:
        tick = time.perf_counter()
        deficit = deficit_at(epoch)
        lr, train_loss, train_acc = train_epoch(
            model, optimizer, data, schedule, seed, epoch, deficit, step, lr_scheduler
        )
        held_out = evaluate_batches(model, data.test_batches(EVAL_BATCH))
        records.append(EpochRecord(
            epoch=epoch, lr=lr, train_loss=train_loss, train_acc=train_acc,
            test_loss=held_out.loss, test_acc=held_out.acc, deficit_on=deficit is not None,
            seconds=time.perf_counter() - tick))
        if not np.isfinite(train_loss):
            return records, held_out, epoch
        if after_epoch is not None:
            after_epoch(model, epoch)
    return records, held_out, None


def train_from_scratch(config: dict[str, Any], run, threads: int = 1):
    """Train one run start to end in a single pass, no checkpoints: the reference for branching.

    Returns (model, optimizer, epoch records). Used by tests and benchmarks to show that a run
    assembled from shared segments is bit-identical to the same run trained on its own.
    """
    torch.set_num_threads(threads)
    data = load_data(config["data"])
    learner = build_learner(config, data, run.seed)
    deficit = _deficit(config, data, run.seed) if run.length > 0 else None
    records, _, _ = train_epochs(
        learner.model, learner.optimizer, data, config["schedule"], run.seed, range(run.end),
        lambda epoch: deficit if run.deficit_on(epoch) else None,
        step=learner.step, lr_scheduler=learner.lr_scheduler,
    )
    return learner.model, learner.optimizer, records
