"""Build data, model and deficit from config once in the main process, to fail early.

Everything a worker will build later is built here first, so a bad ``_target_``, a missing
folder or a model whose output does not match the classes stops the sweep before the results
folder is touched, with one line that names the config group.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from typing import Any

import torch
from hydra.errors import InstantiationException
from hydra.utils import instantiate

from periodscan.data.base import TensorData
from periodscan.deficits.base import Deficit
from periodscan.engine.segment import build_model, load_data
from periodscan.errors import ConfigError, PeriodscanError


def _unwrap(group: str, err: Exception) -> PeriodscanError:
    """Hydra wraps errors raised by targets; surface ours, summarise the rest in one line."""
    cause = err.__cause__ or err.__context__
    while cause is not None:
        if isinstance(cause, PeriodscanError):
            return cause
        cause = cause.__cause__ or cause.__context__
    text = " ".join(str(err).split())
    located = re.match(r"Error locating target '([^']+)'", text)
    if located:
        why = _last_line(err.__cause__) if err.__cause__ is not None else "not found"
        return ConfigError(f"{group}._target_: cannot import '{located.group(1)}' ({why})")
    if err.__cause__ is not None:
        return ConfigError(f"{group}: {type(err.__cause__).__name__}: {_last_line(err.__cause__)}")
    return ConfigError(f"{group}: {text}")


def _last_line(err: BaseException) -> str:
    """The most specific line of a (possibly multi-line) message, quotes of inner reprs removed."""
    lines = [ln.strip() for ln in str(err).splitlines() if ln.strip()]
    inner = [ln for ln in lines if re.match(r"\w+Error\(", ln)]
    line = inner[-1] if inner else (lines[0] if lines else type(err).__name__)
    match = re.match(r"\w+Error\((['\"])(.*)\1\)$", line)
    return match.group(2) if match else line


def _build(group: str, build: Callable[[], Any]) -> Any:
    try:
        return build()
    except InstantiationException as err:
        raise _unwrap(group, err) from None


def check_components(plain: dict[str, Any]) -> TensorData:
    """Instantiate every component, pass one batch through deficit and model; return the data."""
    data = _build("data", lambda: load_data(plain["data"]))
    if not isinstance(data, TensorData):
        raise ConfigError(f"data: the loader must return periodscan.data.TensorData; got "
                          f"{type(data).__name__}")
    deficit = _build("deficit", lambda: instantiate(plain["deficit"]))
    if not isinstance(deficit, Deficit):
        raise ConfigError(f"deficit: the target must build a periodscan.deficits.Deficit; got "
                          f"{type(deficit).__name__}")
    model = _build("model", lambda: build_model(plain, data, seed=0))
    if not isinstance(model, torch.nn.Module):
        raise ConfigError(f"model: the target must build a torch.nn.Module; got "
                          f"{type(model).__name__}")
    x, y = _trial_batch(deficit, data)
    try:
        with torch.no_grad():
            model.eval()
            out = model(x)
    except Exception as err:  # noqa: BLE001 - any failure here is a model/data mismatch
        raise ConfigError(f"model: a batch of shape {tuple(x.shape)} (the data's examples) does "
                          f"not pass through it: {type(err).__name__}: {_last_line(err)}") from None
    if not isinstance(out, torch.Tensor) or tuple(out.shape) != (len(x), data.num_classes):
        got = tuple(out.shape) if isinstance(out, torch.Tensor) else type(out).__name__
        raise ConfigError(
            f"model: output shape for a batch of {len(x)} must be ({len(x)}, {data.num_classes}) "
            f"for {data.num_classes} classes; got {got}"
        )
    return data


def _trial_batch(deficit: Deficit, data: TensorData) -> tuple[torch.Tensor, torch.Tensor]:
    """Let the deficit prepare, select and change two examples, as training will."""
    gen = torch.Generator().manual_seed(0)
    try:
        deficit.prepare(data, gen)
        order = deficit.select(torch.arange(len(data.y_train)), data, gen)
        idx = order[:2] if len(order) >= 2 else torch.arange(2)
        x, y = deficit.apply(data.x_train[idx], data.y_train[idx], idx, gen)
    except PeriodscanError:
        raise
    except Exception as err:  # noqa: BLE001 - a deficit that cannot handle this data
        raise ConfigError(f"deficit: fails on a batch of this data (examples of shape "
                          f"{tuple(data.x_train.shape[1:])}): {type(err).__name__}: "
                          f"{_last_line(err)}") from None
    if tuple(x.shape[1:]) != tuple(data.x_train.shape[1:]) or len(y) != len(x):
        raise ConfigError(f"deficit: must keep the shape of examples {tuple(data.input_shape)} and "
                          f"one label per example; got inputs {tuple(x.shape)}, labels "
                          f"{tuple(y.shape)}")
    return x, y
