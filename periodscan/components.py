"""Build data, model, deficit, monitor and step once in the main process, to fail early.

Everything a worker will build later is built here first, so a bad ``_target_``, a missing
folder or a model whose output does not match the classes stops the sweep before the results
folder is touched, with one line that names the config group.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Collection
from pathlib import Path
from typing import Any

import torch
from hydra.errors import InstantiationException
from hydra.utils import instantiate

from periodscan.data.base import TensorData
from periodscan.data.stream import StreamData, check_examples
from periodscan.deficits.base import Deficit
from periodscan.engine.segment import build_model, load_data
from periodscan.errors import ConfigError, PeriodscanError
from periodscan.steps.check import check_training

#: Keys the size presets (experiment=tiny) set on whatever data they are combined with.
PRESET_DATA_KEYS = ("n_train", "n_test")


def _unwrap(group: str, err: Exception, keys: Collection[str] = ()) -> PeriodscanError:
    """Hydra wraps errors raised by targets; surface ours, summarise the rest in one line.

    ``keys`` are the keys of the group's config, to name every size-preset key a user's loader
    does not take, not only the first one Python reports.
    """
    cause = err.__cause__ or err.__context__
    while cause is not None:
        if isinstance(cause, PeriodscanError):
            return cause
        cause = cause.__cause__ or cause.__context__
    text = " ".join(str(err).split())
    located = re.match(r"Error locating target '([^']+)'", text)
    if located:
        why = _last_line(err.__cause__) if err.__cause__ is not None else "not found"
        return ConfigError(f"{group}._target_: cannot import '{located.group(1)}' ({why})"
                           + _import_hint(located.group(1), err))
    if err.__cause__ is not None:
        line = _last_line(err.__cause__)
        unexpected = re.search(r"unexpected keyword argument '(\w+)'", line)
        if group == "data" and unexpected and unexpected.group(1) in PRESET_DATA_KEYS:
            return ConfigError(f"data: {line} ({_preset_hint(unexpected.group(1), keys)})")
        return ConfigError(f"{group}: {type(err.__cause__).__name__}: {line}")
    return ConfigError(f"{group}: {text}")


def _preset_hint(key: str, keys: Collection[str]) -> str:
    """Where a size key the user's loader does not take came from, and the two ways out."""
    named = [f"data.{k}" for k in PRESET_DATA_KEYS if k == key or k in keys]
    drop = " ".join(f"~{k}" for k in named)
    if len(named) == 1:
        return (f"a size preset such as experiment=tiny sets {named[0]}; drop it with {drop} or "
                f"give your loader that argument")
    return (f"a size preset such as experiment=tiny sets {' and '.join(named)}; drop them with "
            f"{drop} or give your loader those arguments")


def _import_hint(target: str, err: BaseException) -> str:
    """How to make ``target`` importable when its module is a file in the current folder.

    The ``periodscan`` command starts with its own folder on ``sys.path``, not the current one,
    so ``./my_models.py`` next to the user is not found. ``PYTHONPATH=.`` fixes it for the
    command and, through the environment, for local worker processes.
    """
    top = target.split(".")[0]
    missing, link = set(), err
    while link is not None:
        if isinstance(link, ModuleNotFoundError):
            missing.add(link.name)
        link = link.__cause__ or link.__context__
    here = Path.cwd()
    found = [p for p in (here / f"{top}.py", here / top) if p.exists()]
    if top not in missing or not found:
        return ""
    shown = f"./{found[0].name}" + ("/" if found[0].is_dir() else "")
    return (f"; {shown} is in this folder but not on Python's import path: run with "
            f"PYTHONPATH=. (e.g. PYTHONPATH=. periodscan sweep ...), or pip install -e the "
            f"package it belongs to")


def _last_line(err: BaseException) -> str:
    """The most specific line of a (possibly multi-line) message, quotes of inner reprs removed."""
    lines = [ln.strip() for ln in str(err).splitlines() if ln.strip()]
    inner = [ln for ln in lines if re.match(r"\w+Error\(", ln)]
    line = inner[-1] if inner else (lines[0] if lines else type(err).__name__)
    match = re.match(r"\w+Error\((['\"])(.*)\1\)$", line)
    return match.group(2) if match else line


def _build(group: str, build: Callable[[], Any], keys: Collection[str] = ()) -> Any:
    try:
        return build()
    except InstantiationException as err:
        raise _unwrap(group, err, keys) from None


def check_components(plain: dict[str, Any]) -> TensorData | StreamData:
    """Instantiate every component, pass one batch through deficit and model; return the data."""
    data = _build("data", lambda: load_data(plain["data"]), keys=plain["data"])
    if not isinstance(data, (TensorData, StreamData)):
        raise ConfigError(f"data: the loader must return periodscan.data.TensorData or "
                          f"StreamData; got {type(data).__name__}")
    if isinstance(data, StreamData):
        check_examples(data)  # shapes, integer labels, reads that depend only on the index
    deficit = _build("deficit", lambda: instantiate(plain["deficit"]))
    if not isinstance(deficit, Deficit):
        raise ConfigError(f"deficit: the target must build a periodscan.deficits.Deficit; got "
                          f"{type(deficit).__name__}")
    monitor = plain.get("monitor") or {}
    if monitor.get("_target_"):
        _build("monitor", lambda: instantiate(monitor))
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
    check_training(plain, model, x, y, data.num_classes)  # step, optimizer, scheduler, device
    return data


def _trial_batch(deficit: Deficit,
                 data: TensorData | StreamData) -> tuple[torch.Tensor, torch.Tensor]:
    """Let the deficit prepare, select and change two examples, as training will."""
    gen = torch.Generator().manual_seed(0)
    try:
        deficit.prepare(data, gen)
        order = deficit.select(torch.arange(len(data.y_train)), data, gen)
        idx = order[:2] if len(order) >= 2 else torch.arange(2)
        x, y = deficit.apply(*data.train_examples(idx), idx, gen)
    except PeriodscanError:
        raise
    except Exception as err:  # noqa: BLE001 - a deficit that cannot handle this data
        raise ConfigError(f"deficit: fails on a batch of this data (examples of shape "
                          f"{tuple(data.input_shape)}): {type(err).__name__}: "
                          f"{_last_line(err)}") from None
    if tuple(x.shape[1:]) != tuple(data.input_shape) or len(y) != len(x):
        raise ConfigError(f"deficit: must keep the shape of examples {tuple(data.input_shape)} and "
                          f"one label per example; got inputs {tuple(x.shape)}, labels "
                          f"{tuple(y.shape)}")
    return x, y
