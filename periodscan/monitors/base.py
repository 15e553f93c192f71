"""What a monitor is: a per-epoch probe of the model whose readings the ledger stores.

A monitor watches training without taking part in it. The engine reads two attributes of the
monitor to decide where to call it (``every``, ``on_windows``); the monitor itself only turns
a model into numbers. Built-in and user monitors plug in the same way: a ``_target_`` in the
``monitor`` config group (``configs/monitor/``) naming a :class:`Monitor` subclass.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

from hydra.errors import InstantiationException
from hydra.utils import instantiate

from periodscan.errors import ConfigError, PeriodscanError, bad_value

if TYPE_CHECKING:  # the base class itself needs no torch
    import torch

    from periodscan.data.base import TensorData

FIELD = "monitor._target_"


class Monitor:
    """Base class for built-in and user monitors (plug in your own with ``_target_``).

    The engine calls ``monitor(model, data, seed, epoch)`` after the held-out evaluation of
    epoch ``epoch`` when ``epoch % every == 0``, on every segment of the clean trunk, and on
    segments trained with or after a deficit too when ``on_windows`` is true. Each returned
    ``name: value`` pair is stored in the ledger as a reading of that epoch (the ``extras``
    table; ``SweepView.extras`` reads it back along each run's path).

    A monitor must leave training exactly as it would be without it: draw randomness only
    from generators of :func:`periodscan.seeding.generator` keyed by (seed, epoch, purpose),
    never from torch's global RNG; leave parameters, buffers and ``.grad`` untouched; restore
    the model's train/eval mode if it changes it. ``tests/test_fisher.py`` checks this for
    the Fisher monitor by training with and without it.

    The engine builds a monitor once in the sweep process (to read ``every`` and
    ``on_windows``) and once per segment in the worker that trains it, so ``__init__`` should
    be cheap; it is handed only the config's keyword arguments.

    Attributes
    ----------
    every : int
        Probe after epochs 0, every, 2 * every, ...; other epochs record nothing.
    on_windows : bool
        Also probe segments trained with or after a deficit (every branch pays the cost);
        otherwise only the clean trunk (the baselines' shared segments) is probed.
    """

    every: int = 1
    on_windows: bool = False

    def __init__(self, every: int = 1, on_windows: bool = False) -> None:
        self.every, self.on_windows = check_schedule(every, on_windows)

    def __call__(self, model: torch.nn.Module, data: TensorData, seed: int,
                 epoch: int) -> dict[str, float]:
        """Readings of ``model`` after epoch ``epoch`` of seed ``seed``: name -> value.

        Name readings ``<kind>/<what>`` (the Fisher monitor writes ``fisher/total``,
        ``fisher/<module>``); an empty dict records nothing.
        """
        raise NotImplementedError(f"{type(self).__name__} must define __call__")


def check_schedule(every: object, on_windows: object) -> tuple[int, bool]:
    """``every`` must be an int >= 1 and ``on_windows`` a bool; return them."""
    if isinstance(every, bool) or not isinstance(every, int) or every < 1:
        raise bad_value("monitor.every", "an int >= 1", every)
    if not isinstance(on_windows, bool):
        raise bad_value("monitor.on_windows", "a bool (true or false)", on_windows)
    return every, on_windows


def build_monitor(settings: Mapping[str, Any] | None) -> Monitor | None:
    """The :class:`Monitor` a ``monitor`` config builds; None when it names none (``{}``).

    Raises :class:`~periodscan.errors.ConfigError` naming ``monitor._target_`` when the target
    cannot be imported or builds something other than a Monitor, and the monitor's own
    ConfigError when one of its settings is out of range.
    """
    if not settings or not settings.get("_target_"):
        return None
    target = settings["_target_"]
    try:
        monitor = instantiate(settings)
    except InstantiationException as err:
        raise _plain_error(target, err) from None
    if not isinstance(monitor, Monitor):
        raise ConfigError(
            f"The '{FIELD}' parameter must name a subclass of periodscan.monitors.Monitor (or "
            f"a function returning one), such as 'periodscan.monitors.FisherMonitor'. Got "
            f"{target!r} instead, which builds {type(monitor).__module__}."
            f"{type(monitor).__qualname__}.")
    check_schedule(monitor.every, monitor.on_windows)
    return monitor


def monitor_every(settings: Mapping[str, Any] | None) -> int:
    """The ``every`` of the monitor a config builds (its epochs 0, every, ...); 1 for none."""
    monitor = build_monitor(settings)
    return monitor.every if monitor is not None else 1


def check_monitor(settings: Mapping[str, Any] | None) -> None:
    """Refuse a ``monitor`` config that does not build a valid :class:`Monitor` (see above)."""
    build_monitor(settings)


def _plain_error(target: str, err: InstantiationException) -> PeriodscanError:
    """Our own error from inside the monitor's ``__init__``, else one line naming the target."""
    cause: BaseException | None = err.__cause__ or err.__context__
    while cause is not None:
        if isinstance(cause, PeriodscanError):
            return cause
        cause = cause.__cause__ or cause.__context__
    why = err.__cause__
    if str(err).startswith("Error locating target"):
        missing = re.search(r"No module named '[^']+'", str(why))
        return ConfigError(f"The '{FIELD}' parameter must name an importable Monitor class. "
                           f"Got {target!r} instead, which cannot be imported"
                           f"{f' ({missing.group(0)})' if missing else ''}.")
    detail = f"{type(why).__name__}: {why}" if why is not None else str(err)
    return ConfigError(f"monitor: building {target!r} failed: {' '.join(detail.split())}")
