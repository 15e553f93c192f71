"""Where training runs: the ``device`` setting, per-worker devices, determinism, CPU checkpoints.

``device=auto`` picks CUDA, then Apple's MPS, then the CPU. It is resolved once, in the process
that prepares the sweep, so the identity hash and every worker see the same kind of device (CPU
and CUDA give different numbers, like two thread counts do). A worker turns the kind into its
own device: with several GPUs, local worker ``i`` (loky names its processes ``LokyProcess-1``,
``-2``, ...) trains on ``cuda:(i - 1) % count``. On Dask, give each worker its own GPU by
starting it with ``CUDA_VISIBLE_DEVICES`` set to one device (every worker then uses its cuda:0).

On an accelerator, exact branching needs deterministic kernels: :func:`use_device` turns on
``torch.use_deterministic_algorithms(True)`` and sets ``CUBLAS_WORKSPACE_CONFIG=:4096:8``, which
cuBLAS needs for reproducible results (PyTorch's "Reproducibility" notes). On the CPU nothing
changes: its kernels are already deterministic at a fixed thread count.
"""

from __future__ import annotations

import multiprocessing
import os
import re
from typing import Any

import torch

from periodscan.errors import bad_value

#: The values of the root ``device`` setting.
DEVICES = ("auto", "cpu", "cuda", "mps")
#: cuBLAS workspace setting that makes its results reproducible (PyTorch reproducibility notes).
CUBLAS_WORKSPACE = ":4096:8"


def available(kind: str) -> bool:
    """Whether torch can train on a device of this kind in this process."""
    if kind == "cuda":
        return torch.cuda.is_available()
    if kind == "mps":
        return torch.backends.mps.is_available()
    return kind == "cpu"


def resolve_device(name: str | None) -> str:
    """'cpu', 'cuda' or 'mps' for a ``device`` setting (None: cpu); refuse one not here."""
    if name is None:
        return "cpu"
    if name == "auto":
        return next(kind for kind in ("cuda", "mps", "cpu") if available(kind))
    if name not in DEVICES:
        raise bad_value("device", "one of " + ", ".join(map(repr, DEVICES)), name)
    if not available(name):
        here = [d for d in DEVICES if d == "auto" or available(d)]
        raise bad_value("device", "one this machine has (" + ", ".join(map(repr, here))
                        + f"; torch finds no {name.upper()} device here)", name)
    return name


def worker_index(process_name: str | None = None) -> int:
    """0-based index of this worker process (``LokyProcess-3`` -> 2); 0 for any other process."""
    name = multiprocessing.current_process().name if process_name is None else process_name
    found = re.fullmatch(r"LokyProcess-(\d+)", name)
    return int(found.group(1)) - 1 if found else 0


def worker_device(kind: str, index: int, count: int) -> torch.device:
    """The device worker ``index`` trains on, given ``count`` devices of ``kind`` (CUDA only)."""
    if kind == "cuda":
        return torch.device("cuda", index % max(count, 1))
    return torch.device(kind)


def use_device(kind: str | None) -> torch.device:
    """This worker's device for a resolved kind, with deterministic kernels on an accelerator."""
    kind = kind or "cpu"
    if kind != "cpu":
        os.environ.setdefault("CUBLAS_WORKSPACE_CONFIG", CUBLAS_WORKSPACE)
        torch.use_deterministic_algorithms(True)
    count = torch.cuda.device_count() if kind == "cuda" else 1
    return worker_device(kind, worker_index(), count)


def model_device(model: torch.nn.Module) -> torch.device:
    """The device of the model's first parameter or buffer (CPU for a model with neither)."""
    for tensor in (*model.parameters(), *model.buffers()):
        return tensor.device
    return torch.device("cpu")


def on_cpu(state: Any) -> Any:
    """``state`` with every tensor on the CPU; returned as is when all of them already are.

    Containers keep their type and attributes (a model's state dict carries ``_metadata``), so
    a checkpoint saved from a GPU loads anywhere, and one saved on the CPU is unchanged.
    """
    if not _off_cpu(state):
        return state
    if isinstance(state, torch.Tensor):
        return state.cpu()
    if isinstance(state, dict):
        moved = type(state)((key, on_cpu(value)) for key, value in state.items())
        if hasattr(state, "__dict__"):
            vars(moved).update(vars(state))
        return moved
    return type(state)(on_cpu(value) for value in state)


def _off_cpu(state: Any) -> bool:
    if isinstance(state, torch.Tensor):
        return state.device.type != "cpu"
    if isinstance(state, dict):
        return any(_off_cpu(value) for value in state.values())
    if isinstance(state, (list, tuple)):
        return any(_off_cpu(value) for value in state)
    return False
