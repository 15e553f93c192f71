"""Fisher information of the weights during training: the math, the forecast rule, the job.

:mod:`periodscan.fisher.trace` computes the trace (per layer) and
:mod:`periodscan.fisher.layerwise` its fast per-example route; :mod:`periodscan.fisher.rule`
turns a curve of traces into a predicted critical window. The per-epoch probe that records the
trace during a sweep is :class:`periodscan.monitors.FisherMonitor` (``monitor=fisher``).

This package module imports nothing heavy: readers of stored readings need only the names.
"""

#: The Fisher monitor stores its readings as ``PREFIX + "total"`` and ``PREFIX + <module name>``.
PREFIX = "fisher/"
TOTAL = PREFIX + "total"

__all__ = ["PREFIX", "TOTAL"]
