"""The Fisher monitor (``monitor=fisher``): the trace of the Fisher information, every epoch.

It records the trace of the Fisher information of the weights on a fixed probe set of clean
training examples, per layer and in total, after the epochs the engine calls it on. The math
is in :mod:`periodscan.fisher.trace`; the forecast of the critical window built on these
readings is the ``forecast`` job's.
"""

from __future__ import annotations

import torch

from periodscan.data.base import TensorData
from periodscan.errors import bad_value
from periodscan.fisher import PREFIX, TOTAL
from periodscan.fisher.trace import ESTIMATORS, METHODS, fisher_trace
from periodscan.monitors.base import Monitor
from periodscan.seeding import ONCE, generator

__all__ = ["PREFIX", "TOTAL", "FisherMonitor", "probe_indices"]


def probe_indices(seed: int, n_train: int, size: int) -> torch.Tensor:
    """The fixed probe of a seed: ``size`` training indices (sorted), the same at every epoch."""
    order = torch.randperm(n_train, generator=generator(seed, ONCE, "fisher-probe"))
    return order[: min(size, n_train)].sort().values


class FisherMonitor(Monitor):
    """Per-epoch trace of the Fisher information on a fixed probe of clean training examples.

    Returns ``{"fisher/total": ..., "fisher/<module>": ...}`` where ``<module>`` is the dotted
    name of each module that owns parameters (for CNN1d: ``fisher/features.0``,
    ``features.2``, ``features.4``, ``head``; BatchNorm's affine weights count as a layer of
    their own). The probe uses the clean training data even on deficit runs.

    Training is unchanged by the monitor: the probe is chosen by a generator keyed by
    (seed, "fisher-probe"), sampled labels come from one keyed by (seed, epoch, "fisher"), the
    model is probed in eval mode (BatchNorm running statistics, no dropout) through
    ``functional_call``/hooks that leave parameters, buffers and ``.grad`` alone, and the
    model's train/eval mode is restored afterwards.

    Parameters
    ----------
    probe_size : int
        Training examples in the probe (the same ones at every epoch of a seed).
    estimator : {"empirical", "sampled", "expected"}
        Labels in the log-likelihood; see :mod:`periodscan.fisher.trace`.
    samples : int
        Labels drawn per probe example by ``"sampled"``.
    every : int
        The engine probes after epochs 0, every, 2*every, ... (see :class:`Monitor`).
    method : {"auto", "layerwise", "vmap"}
        Route for per-example gradients; ``auto`` picks the faster one the model allows.
    chunk_size : int
        Examples per vectorised chunk (bounds memory).
    on_windows : bool
        Also probe segments trained with or after a deficit (see :class:`Monitor`).
    """

    def __init__(self, probe_size: int = 256, estimator: str = "empirical", samples: int = 1,
                 every: int = 1, method: str = "auto", chunk_size: int = 256,
                 on_windows: bool = False) -> None:
        super().__init__(every=every, on_windows=on_windows)
        self.probe_size = _positive_int("monitor.probe_size", probe_size)
        if estimator not in ESTIMATORS:
            raise bad_value("monitor.estimator", f"one of {', '.join(map(repr, ESTIMATORS))}",
                            estimator)
        if method not in METHODS:
            raise bad_value("monitor.method", f"one of {', '.join(map(repr, METHODS))}", method)
        self.estimator = estimator
        self.method = method
        self.samples = _positive_int("monitor.samples", samples)
        self.chunk_size = _positive_int("monitor.chunk_size", chunk_size)
        self._probes: dict[tuple[int, int], tuple[torch.Tensor, torch.Tensor]] = {}

    def __call__(self, model: torch.nn.Module, data: TensorData, seed: int,
                 epoch: int) -> dict[str, float]:
        key = (seed, len(data.y_train))
        if key not in self._probes:  # read once: streamed data reads files example by example
            idx = probe_indices(seed, len(data.y_train), self.probe_size)
            self._probes[key] = data.train_examples(idx)
        x, y = self._probes[key]
        gen = generator(seed, epoch, "fisher") if self.estimator == "sampled" else None
        layers = fisher_trace(model, x, y,
                              estimator=self.estimator, samples=self.samples, gen=gen,
                              method=self.method, chunk_size=self.chunk_size)
        readings = {TOTAL: sum(layers.values())}
        readings.update({PREFIX + name: value for name, value in layers.items()})
        return readings


def _positive_int(field: str, value: object) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise bad_value(field, "an int >= 1", value)
    return value
