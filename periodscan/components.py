"""Build data, model and deficit from config once in the main process, to fail early.

Everything a worker will build later is built here first, so a bad ``_target_``, a missing
folder or a model whose output does not match the classes stops the sweep before the results
folder is touched, with one line that names the config group.
"""

from __future__ import annotations

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
    return ConfigError(f"{group}: {text}")


def check_components(plain: dict[str, Any]) -> TensorData:
    """Instantiate every component and push one batch through the model; return the data."""
    try:
        data = load_data(plain["data"])
    except InstantiationException as err:
        raise _unwrap("data", err) from None
    if not isinstance(data, TensorData):
        raise ConfigError(f"data: the loader must return periodscan.data.TensorData; got "
                          f"{type(data).__name__}")
    try:
        deficit = instantiate(plain["deficit"])
    except InstantiationException as err:
        raise _unwrap("deficit", err) from None
    if not isinstance(deficit, Deficit):
        raise ConfigError(f"deficit: the target must build a periodscan.deficits.Deficit; got "
                          f"{type(deficit).__name__}")
    try:
        model = build_model(plain, data, seed=0)
    except InstantiationException as err:
        raise _unwrap("model", err) from None
    deficit.prepare(data, torch.Generator().manual_seed(0))
    with torch.no_grad():
        model.eval()
        out = model(data.x_train[:2])
    if tuple(out.shape) != (2, data.num_classes):
        raise ConfigError(
            f"model: output shape for a batch of 2 must be (2, {data.num_classes}) for "
            f"{data.num_classes} classes; got {tuple(out.shape)}"
        )
    return data
