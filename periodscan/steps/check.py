"""The training recipe checked at the boundary: step, optimizer, scheduler and device.

:func:`check_training` runs once in the process that prepares a sweep, on the model and the
trial batch that :mod:`periodscan.components` has just built, so a step that returns the wrong
thing, an optimizer ``_target_`` that is not an optimizer, or a device this machine lacks is
refused with one line before any results folder is touched.
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from typing import Any

import torch
from hydra.errors import InstantiationException

from periodscan.config import LATER_TRAINING_DEFAULTS
from periodscan.engine.device import resolve_device, use_device
from periodscan.engine.schedule import build_lr_scheduler, build_optimizer
from periodscan.errors import ConfigError, PeriodscanError
from periodscan.steps import Step, build_step


def check_training(plain: dict[str, Any], model: torch.nn.Module, x: torch.Tensor,
                   y: torch.Tensor, num_classes: int) -> None:
    """Settle ``step`` and ``device`` in ``plain``, then train one trial step on a copy of model.

    A config from before these keys existed gets their defaults (cross-entropy on the CPU);
    ``device: auto`` becomes the device that will train, so the identity hash and every worker
    see the same one.
    """
    for key, default in LATER_TRAINING_DEFAULTS.items():
        plain.setdefault(key, copy.deepcopy(default))
    plain["device"] = resolve_device(plain["device"])
    step = _built("step", lambda: build_step(plain["step"]))
    if not isinstance(step, Step):
        raise ConfigError(f"step: the target must build a periodscan.steps.Step; got "
                          f"{type(step).__name__}")
    device = use_device(plain["device"])
    trial = copy.deepcopy(model).to(device).train()
    optimizer = _built("schedule.optimizer",
                       lambda: build_optimizer(trial.parameters(), plain["schedule"]))
    lr_scheduler = _built("schedule.lr_scheduler",
                          lambda: build_lr_scheduler(optimizer, plain["schedule"]))
    x, y = x.to(device), y.to(device)
    try:
        out = step(trial, optimizer, x, y, torch.Generator().manual_seed(0))
        if lr_scheduler is not None:
            lr_scheduler.step()
    except PeriodscanError:
        raise
    except Exception as err:  # noqa: BLE001 - any failure here is the step's or the recipe's
        raise ConfigError(f"step: fails on a trial batch of shape {tuple(x.shape)} on "
                          f"{device}: {type(err).__name__}: {_first_line(err)}") from None
    check_step_output(out, len(x), num_classes)


def check_step_output(out: Any, batch: int, classes: int) -> None:
    """A step returns (scalar floating loss, logits of shape (batch, classes))."""
    if not (isinstance(out, tuple) and len(out) == 2):
        raise ConfigError(f"step: must return (loss, logits); got {_shown(out)}")
    loss, logits = out
    if not (isinstance(loss, torch.Tensor) and loss.dim() == 0 and loss.is_floating_point()):
        raise ConfigError(f"step: the loss it returns must be a scalar floating tensor (the "
                          f"batch's mean loss, shape ()); got {_shown(loss)}")
    if not (isinstance(logits, torch.Tensor) and tuple(logits.shape) == (batch, classes)):
        raise ConfigError(f"step: the logits it returns must have shape ({batch}, {classes}) "
                          f"for a batch of {batch}; got {_shown(logits)}")


def _built(field: str, build: Callable[[], Any]) -> Any:
    """``build()``; a failure becomes one ConfigError line naming ``field``."""
    try:
        return build()
    except PeriodscanError:
        raise
    except InstantiationException as err:
        cause = err.__cause__
        while cause is not None and cause.__cause__ is not None and not isinstance(
                cause, PeriodscanError):
            cause = cause.__cause__
        if isinstance(cause, PeriodscanError):
            raise cause from None
        if cause is None:
            raise ConfigError(f"{field}: {_first_line(err)}") from None
        raise ConfigError(f"{field}: {type(cause).__name__}: {_first_line(cause)}") from None
    except Exception as err:  # noqa: BLE001 - e.g. a keyword the torch class does not take
        raise ConfigError(f"{field}: {type(err).__name__}: {_first_line(err)}") from None


def _first_line(err: BaseException) -> str:
    lines = [line.strip() for line in str(err).splitlines() if line.strip()]
    return lines[0] if lines else type(err).__name__


def _shown(value: Any) -> str:
    if isinstance(value, torch.Tensor):
        return f"a {value.dtype} tensor of shape {tuple(value.shape)}"
    if isinstance(value, tuple):
        return f"a tuple of {len(value)}"
    return type(value).__name__
