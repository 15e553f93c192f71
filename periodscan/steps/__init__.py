"""Training steps: the per-batch update, built in or user-supplied.

A user step subclasses :class:`Step` and is named in config with ``_target_``, exactly like
the built-ins listed in ``configs/step/`` (``step=cross_entropy``, ``step=label_smoothing``,
``step=clip``).
"""

from __future__ import annotations

from typing import Any

from hydra.utils import instantiate

from periodscan.steps.base import Step
from periodscan.steps.builtin import CrossEntropy


def build_step(config: dict[str, Any] | None) -> Step:
    """The step a config names; no config (one written before steps existed) is CrossEntropy()."""
    return CrossEntropy() if not config else instantiate(config)


__all__ = ["CrossEntropy", "Step", "build_step"]
