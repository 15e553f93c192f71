"""The training recipe: optimizer construction and the learning rate as a pure function of epoch.

The learning rate is computed from the epoch number rather than kept in a stateful scheduler,
so a run resumed from a checkpoint at any epoch continues on exactly the same schedule.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from typing import Any

import torch

from periodscan.errors import bad_value

OPTIMIZERS = ("sgd", "adam")
LR_SCHEDULES = ("constant", "step", "exponential", "cosine")


def lr_at(epoch: int, schedule: Mapping[str, Any]) -> float:
    """Learning rate used throughout ``epoch`` (0-based).

    ``constant``: lr. ``step``: lr * gamma ** (epoch // step_size). ``exponential``:
    lr * gamma ** epoch. ``cosine``: from lr down to min_lr over ``schedule.epochs`` epochs,
    then held at min_lr (a fixed_recovery run may train past the schedule's last epoch).
    An optional linear warm-up over ``warmup_epochs`` multiplies any of these.
    """
    opt = schedule["optimizer"]
    lrs = schedule["lr_schedule"]
    base = float(opt["lr"])
    kind = lrs["kind"]
    if kind == "constant":
        lr = base
    elif kind == "step":
        lr = base * float(lrs["gamma"]) ** (epoch // int(lrs["step_size"]))
    elif kind == "exponential":
        lr = base * float(lrs["gamma"]) ** epoch
    elif kind == "cosine":
        horizon = max(int(schedule["epochs"]), 1)
        t = min(epoch, horizon) / horizon
        lo = float(lrs.get("min_lr", 0.0))
        lr = lo + 0.5 * (base - lo) * (1.0 + math.cos(math.pi * t))
    else:
        raise bad_value("schedule.lr_schedule.kind", f"one of {LR_SCHEDULES}", kind)
    warmup = int(lrs.get("warmup_epochs", 0) or 0)
    if warmup > 0 and epoch < warmup:
        lr *= (epoch + 1) / warmup
    return lr


def build_optimizer(
    params: Iterable[torch.nn.Parameter], schedule: Mapping[str, Any]
) -> torch.optim.Optimizer:
    """SGD (with momentum / Nesterov) or Adam, with decoupled-from-nothing L2 weight decay."""
    opt = schedule["optimizer"]
    name = opt["name"]
    if name == "sgd":
        return torch.optim.SGD(
            params,
            lr=float(opt["lr"]),
            momentum=float(opt.get("momentum", 0.0)),
            weight_decay=float(opt.get("weight_decay", 0.0)),
            nesterov=bool(opt.get("nesterov", False)),
        )
    if name == "adam":
        return torch.optim.Adam(
            params,
            lr=float(opt["lr"]),
            betas=tuple(opt.get("betas", (0.9, 0.999))),
            weight_decay=float(opt.get("weight_decay", 0.0)),
        )
    raise bad_value("schedule.optimizer.name", f"one of {OPTIMIZERS}", name)
