"""Test-only deficits that misbehave on purpose, importable by worker processes.

pytest puts tests/ on ``sys.path`` and loky / Dask workers inherit it, so a config can name
these with ``_target_: helpers.<Class>``. Each one is a Blur that picks its victim by the seed
of the generator it is handed: (seed, ONCE, "deficit") when a run prepares its deficit, (seed,
epoch, "deficit") every deficit epoch; ``gen.initial_seed()`` tells which run is training.
"""

from __future__ import annotations

import importlib.util
import os
import sys
from pathlib import Path
from types import ModuleType

import torch

from periodscan.data.base import TensorData
from periodscan.deficits import Blur
from periodscan.seeding import ONCE, derive_seed


def _is_seed(gen: torch.Generator, seed: int) -> bool:
    return gen.initial_seed() == derive_seed(seed, ONCE, "deficit")


class FailingBlur(Blur):
    """Blur that raises when a run of ``fail_seed`` starts its deficit (a bug in user code)."""

    def __init__(self, sigma: float, fail_seed: int) -> None:
        super().__init__(sigma)
        self.fail_seed = fail_seed

    def prepare(self, data: TensorData, gen: torch.Generator) -> None:
        if _is_seed(gen, self.fail_seed):
            raise RuntimeError(f"deliberate failure for seed {self.fail_seed}")


class DyingBlur(Blur):
    """Blur whose worker process exits abruptly (out of memory, say) at chosen deficit epochs.

    ``always`` and ``once`` are [seed, epoch] pairs (or null): the worker dies whenever it
    trains that deficit epoch, or only the first time (a ``marker`` file remembers). Each epoch
    hands the deficit a generator seeded from (seed, epoch, "deficit"), which identifies both.
    It never kills ``host_pid``, the test process itself, so a serial run is a clean reference.
    """

    def __init__(self, sigma: float, host_pid: int, always: list[int] | None = None,
                 once: list[int] | None = None, marker: str | None = None) -> None:
        super().__init__(sigma)
        self.host_pid, self.always, self.once, self.marker = host_pid, always, once, marker

    def select(self, order: torch.Tensor, data: TensorData, gen: torch.Generator) -> torch.Tensor:
        if os.getpid() != self.host_pid:
            if self.always and _is_epoch(gen, *self.always):
                os._exit(7)
            if self.once and _is_epoch(gen, *self.once) and not Path(self.marker).exists():
                Path(self.marker).touch()
                os._exit(7)
        return order


def _is_epoch(gen: torch.Generator, seed: int, epoch: int) -> bool:
    return gen.initial_seed() == derive_seed(seed, epoch, "deficit")


class Payload:
    """Pickles to a call that creates a file: shows whether unpickling would run code."""

    def __init__(self, target: str) -> None:
        self.target = target

    def __reduce__(self):
        return (Path.touch, (Path(self.target),))


def load_script(path: Path) -> ModuleType:
    """A script outside the package (benchmarks/, docs/) as a module, to call its functions.
    It is registered under its name while it executes (dataclasses look their module up then)."""
    spec = importlib.util.spec_from_file_location(path.stem, path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    try:
        spec.loader.exec_module(module)
    finally:
        del sys.modules[spec.name]
    return module
