"""The built-in step: cross-entropy, with optional label smoothing and gradient-norm clipping.

With its defaults (no smoothing, no clipping) it is the update periodscan has always made, op
for op, so results trained before steps were pluggable keep their numbers.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from periodscan.params import Interval, check_value
from periodscan.steps.base import Step


class CrossEntropy(Step):
    """Mean cross-entropy of the logits against the labels.

    ``label_smoothing`` in [0, 1] mixes the one-hot target with the uniform distribution
    (torch's ``F.cross_entropy(label_smoothing=...)``); ``max_grad_norm`` > 0 rescales all
    gradients together so their 2-norm is at most that (``torch.nn.utils.clip_grad_norm_``).
    """

    def __init__(self, label_smoothing: float = 0.0, max_grad_norm: float | None = None):
        self.label_smoothing = float(check_value(
            "step.label_smoothing", label_smoothing, [Interval(float, 0.0, 1.0)]))
        self.max_grad_norm = check_value(
            "step.max_grad_norm", max_grad_norm,
            [Interval(float, 0.0, None, closed="neither"), None])

    def loss(self, logits: torch.Tensor, y: torch.Tensor,
             generator: torch.Generator) -> torch.Tensor:
        return F.cross_entropy(logits, y, label_smoothing=self.label_smoothing)
