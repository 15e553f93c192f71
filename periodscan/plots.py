"""PNG figures of a sweep; the drawing code lives in :mod:`periodscan.report.figures`.

Kept as the stable import for the sweep's own curve (``sweep.py`` draws ``sensitivity.png``
after every sweep) and for notebooks.
"""

from periodscan.report.figures import (
    PALETTE,
    fisher_by_epoch,
    heatmap,
    learning_curves,
    sensitivity_curve,
)

__all__ = ["PALETTE", "fisher_by_epoch", "heatmap", "learning_curves", "sensitivity_curve"]
