"""The training loop: one straight-line function per epoch, plus evaluation.

Every random draw of epoch ``e`` comes from generators keyed by (seed, e, purpose), and torch's
global RNG (used by dropout) is reseeded from (seed, e, "torch") at the start of the epoch.
Nothing carries over between epochs except model, optimizer and torch-scheduler state, which is
exactly what a checkpoint holds; that is what makes a branched run bit-identical to a
from-scratch one. Batches are drawn, augmented and changed by the deficit on the CPU, then moved
to the model's device for the step (periodscan.steps); evaluation runs on that device too.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import torch
import torch.nn.functional as F

from periodscan.augment import augment_batch
from periodscan.data.base import TensorData
from periodscan.deficits.base import Deficit
from periodscan.engine.device import model_device
from periodscan.engine.schedule import epoch_lr
from periodscan.seeding import ONCE, derive_seed, generator
from periodscan.steps import CrossEntropy, Step

EVAL_BATCH = 1024


@dataclass(kw_only=True)
class Evaluation:
    """Held-out evaluation: mean loss, accuracy and the per-example correctness vector."""

    loss: float
    acc: float
    correct: torch.Tensor  # bool, one entry per held-out example


def prepare_deficit(deficit: Deficit, data: TensorData, seed: int) -> None:
    """Let the deficit make its per-run fixed choices (same in every process for a seed)."""
    deficit.prepare(data, generator(seed, ONCE, "deficit"))


def train_epoch(
    model: torch.nn.Module,
    optimizer: torch.optim.Optimizer,
    data: TensorData,
    schedule: Mapping[str, Any],
    seed: int,
    epoch: int,
    deficit: Deficit | None,
    step: Step | None = None,
    lr_scheduler: torch.optim.lr_scheduler.LRScheduler | None = None,
) -> tuple[float, float, float]:
    """Train one epoch in place; return (lr, mean train loss, train accuracy).

    ``deficit`` is None for a clean epoch; ``step`` updates each batch (default cross-entropy);
    a torch ``lr_scheduler`` steps after the epoch. The loss is NaN when training diverged.
    """
    torch.manual_seed(derive_seed(seed, epoch, "torch"))  # dropout and any user module draws
    lr = epoch_lr(optimizer, schedule, epoch, lr_scheduler)
    step = step if step is not None else CrossEntropy()
    step_gen, device = generator(seed, epoch, "step"), model_device(model)

    n = len(data.y_train)
    order = torch.randperm(n, generator=generator(seed, epoch, "order"))
    deficit_gen = generator(seed, epoch, "deficit")
    if deficit is not None:
        order = deficit.select(order, data, deficit_gen)
    augment = schedule.get("augment") or {}
    use_augment = bool(augment.get("max_shift", 0) or augment.get("hflip", False)) and not (
        deficit is not None and deficit.disables_augmentation
    )
    augment_gen = generator(seed, epoch, "augment")

    batch_size = int(schedule["batch_size"])
    model.train()
    # Running sums stay tensors so the loop never waits on a Python number per batch; a
    # non-finite loss shows up in the epoch's mean (training on after it changes nothing).
    total_loss = torch.zeros((), dtype=torch.float64, device=device)
    total_correct = torch.zeros((), dtype=torch.int64, device=device)
    seen = 0
    batches = index_batches(order, batch_size)
    # x (B, C, *spatial) and y (B,) are read by index: sliced from memory, or read from a
    # Dataset by loader workers (periodscan.data.stream), always in the order drawn above.
    for idx, (x, y) in zip(batches, data.train_batches(batches), strict=True):
        if use_augment:
            x = augment_batch(
                x, augment_gen, int(augment.get("max_shift", 0)), bool(augment.get("hflip", False))
            )
        if deficit is not None:
            x, y = deficit.apply(x, y, idx, deficit_gen)
        x, y = x.to(device), y.to(device)  # no copy on the CPU
        loss, logits = step(model, optimizer, x, y, step_gen)
        total_loss += loss.detach().double() * len(y)
        total_correct += (logits.detach().argmax(1) == y).sum()
        seen += len(y)
    if lr_scheduler is not None:
        lr_scheduler.step()
    return (lr, *epoch_means(total_loss, total_correct, seen))


def index_batches(order: torch.Tensor, batch_size: int) -> list[torch.Tensor]:
    """The epoch's batches of training indices: consecutive slices of ``order``.

    The batches stop before a later batch of one example: BatchNorm cannot normalise it.
    """
    batches = []
    for begin in range(0, len(order), batch_size):
        idx = order[begin : begin + batch_size]
        if len(idx) == 1 and begin > 0:
            break
        batches.append(idx)
    return batches


def epoch_means(total_loss: torch.Tensor, total_correct: torch.Tensor,
                seen: int) -> tuple[float, float]:
    """(mean train loss, train accuracy) from running sums; (NaN, NaN) when training diverged."""
    mean_loss = float(total_loss) / seen if seen else math.nan
    if not math.isfinite(mean_loss):
        return math.nan, math.nan
    return mean_loss, int(total_correct) / seen


def evaluate(model: torch.nn.Module, x: torch.Tensor, y: torch.Tensor) -> Evaluation:
    """:func:`evaluate_batches` on held-out tensors, EVAL_BATCH examples at a time."""
    return evaluate_batches(model, ((x[b : b + EVAL_BATCH], y[b : b + EVAL_BATCH])
                                    for b in range(0, len(y), EVAL_BATCH)))


@torch.no_grad()
def evaluate_batches(model: torch.nn.Module,
                     batches: Iterable[tuple[torch.Tensor, torch.Tensor]]) -> Evaluation:
    """Loss, accuracy and per-example correctness on clean held-out batches, in eval mode.

    ``batches`` yields (inputs, labels) over the held-out split in order (``data.test_batches``).
    Non-finite logits (a diverged model) count as wrong answers, never as a crash.
    """
    model.eval()
    device = model_device(model)
    losses, correct = [], []
    for inputs, labels in batches:
        logits = model(inputs.to(device))
        target = labels.to(device)
        finite = torch.isfinite(logits).all(dim=1)
        losses.append(F.cross_entropy(logits, target, reduction="none").double())
        correct.append((logits.argmax(1) == target) & finite)
    loss = torch.cat(losses).mean().item()
    hits = torch.cat(correct).cpu()
    return Evaluation(loss=loss, acc=hits.double().mean().item(), correct=hits)
