"""The training recipe: optimizer construction and the learning rate of every epoch.

Two ways, mixable: the built-ins (``optimizer.name: sgd|adam`` and an ``lr_schedule.kind``,
the learning rate computed from the epoch number, so a resumed run continues on exactly the
same schedule), or torch's own classes by ``_target_`` (``optimizer._target_:
torch.optim.RMSprop`` with its keyword arguments; ``lr_scheduler._target_:
torch.optim.lr_scheduler.StepLR`` stepped once after every epoch). A torch scheduler keeps
state, so it travels in every checkpoint beside the optimizer's (engine/checkpoint.py).
"""

from __future__ import annotations

import importlib
import math
from collections.abc import Iterable, Mapping
from typing import Any

import torch
from torch.optim.lr_scheduler import LRScheduler, ReduceLROnPlateau

from periodscan.errors import ConfigError, bad_value

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
    """SGD (with momentum / Nesterov) or Adam, with decoupled-from-nothing L2 weight decay; or
    the ``torch.optim.Optimizer`` subclass that ``optimizer._target_`` names, with its keywords.
    """
    opt = schedule["optimizer"]
    if opt.get("_target_"):
        cls = optimizer_class(opt["_target_"])
        return cls(params, **_keywords(opt))
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


def build_lr_scheduler(optimizer: torch.optim.Optimizer,
                       schedule: Mapping[str, Any]) -> LRScheduler | None:
    """The torch scheduler ``schedule.lr_scheduler._target_`` names, or None (built-in rates)."""
    settings = schedule.get("lr_scheduler") or {}
    if not settings.get("_target_"):
        return None
    return scheduler_class(settings["_target_"])(optimizer, **_keywords(settings))


def epoch_lr(optimizer: torch.optim.Optimizer, schedule: Mapping[str, Any], epoch: int,
             lr_scheduler: LRScheduler | None = None) -> float:
    """Set the learning rate of ``epoch`` (0-based) and return it.

    With a torch scheduler the optimizer already holds it (the scheduler stepped after the
    previous epoch, or, for epoch 0, when it was built); otherwise it is :func:`lr_at`'s.
    """
    if lr_scheduler is not None:
        return float(optimizer.param_groups[0]["lr"])
    lr = lr_at(epoch, schedule)
    for group in optimizer.param_groups:
        group["lr"] = lr
    return lr


def optimizer_class(target: str) -> type[torch.optim.Optimizer]:
    """The class ``schedule.optimizer._target_`` names; refuse anything but an Optimizer."""
    found = locate("schedule.optimizer._target_", target)
    if not (isinstance(found, type) and issubclass(found, torch.optim.Optimizer)):
        raise bad_value("schedule.optimizer._target_",
                        "a torch.optim.Optimizer subclass such as 'torch.optim.RMSprop'", target)
    return found


def scheduler_class(target: str) -> type[LRScheduler]:
    """The class ``schedule.lr_scheduler._target_`` names: an LRScheduler stepped per epoch."""
    found = locate("schedule.lr_scheduler._target_", target)
    if not (isinstance(found, type) and issubclass(found, LRScheduler)) or issubclass(
            found, ReduceLROnPlateau):
        raise bad_value("schedule.lr_scheduler._target_",
                        "a torch.optim.lr_scheduler.LRScheduler subclass stepped once per epoch "
                        "without a metric, such as 'torch.optim.lr_scheduler.StepLR' "
                        "(ReduceLROnPlateau would need one)", target)
    return found


def locate(field: str, target: str) -> Any:
    """The object a dotted path names (module, then attributes), without calling it."""
    parts = str(target).split(".")
    for cut in range(len(parts) - 1, 0, -1):
        try:
            found = importlib.import_module(".".join(parts[:cut]))
        except ImportError:
            continue
        try:
            for attribute in parts[cut:]:
                found = getattr(found, attribute)
        except AttributeError:
            break
        return found
    raise ConfigError(f"{field}: cannot import {target!r} (no such module or attribute)")


def check_recipe(schedule: Mapping[str, Any]) -> None:
    """One optimizer (built-in name or ``_target_``) and one way of setting the rate."""
    opt = schedule.get("optimizer") or {}
    if bool(opt.get("name")) == bool(opt.get("_target_")):
        raise bad_value("schedule.optimizer", "given by exactly one of name (one of "
                        f"{', '.join(map(repr, OPTIMIZERS))}) or _target_ (a torch.optim class)",
                        {"name": opt.get("name"), "_target_": opt.get("_target_")})
    kind = (schedule.get("lr_schedule") or {}).get("kind")
    target = (schedule.get("lr_scheduler") or {}).get("_target_")
    if bool(kind) == bool(target):
        raise bad_value("schedule.lr_schedule", "set when schedule.lr_scheduler is not, and "
                        "left out when it is (drop one with ~schedule.lr_schedule or "
                        "~schedule.lr_scheduler)",
                        {"lr_schedule.kind": kind, "lr_scheduler._target_": target})


def _keywords(settings: Mapping[str, Any]) -> dict[str, Any]:
    """A ``_target_`` block's keyword arguments; lists become tuples (``betas``)."""
    return {key: tuple(value) if isinstance(value, list) else value
            for key, value in settings.items() if key != "_target_"}
