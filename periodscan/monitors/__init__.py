"""Monitors: per-epoch probes of the model, built in or user-supplied.

A user monitor subclasses :class:`Monitor` and is named in config with ``_target_``, exactly
like the built-ins listed in ``configs/monitor/`` (``monitor=fisher``, ``monitor=none``).
"""

from periodscan.monitors.base import (
    Monitor,
    build_monitor,
    check_monitor,
    check_schedule,
    monitor_every,
)
from periodscan.monitors.fisher import PREFIX, TOTAL, FisherMonitor

__all__ = ["PREFIX", "TOTAL", "FisherMonitor", "Monitor", "build_monitor", "check_monitor",
           "check_schedule", "monitor_every"]
