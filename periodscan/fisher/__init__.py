"""Fisher information of the weights during training, and a forecast of the critical window.

``FisherMonitor`` is the per-epoch probe the engine runs on the clean trunk (``monitor=fisher``);
``fisher_trace`` is the same computation as a plain function.
"""

from periodscan.fisher.monitor import PREFIX, TOTAL, FisherMonitor, probe_indices
from periodscan.fisher.trace import ESTIMATORS, METHODS, fisher_trace

__all__ = ["ESTIMATORS", "METHODS", "PREFIX", "TOTAL", "FisherMonitor", "fisher_trace",
           "probe_indices"]
