"""A user's own deficit and model, as someone outside the project would write them.

Imported by tests/test_plugins.py through Hydra ``_target_`` (pytest puts tests/ on sys.path).
"""

from __future__ import annotations

import torch

from periodscan.deficits import Deficit


class SignFlipHalf(Deficit):
    """Negate a random half of each batch (drawn from the generator it is handed)."""

    def __init__(self, share: float = 0.5):
        self.share = share

    def apply(self, x, y, idx, gen):
        flip = torch.rand(len(x), generator=gen) < self.share
        return torch.where(flip[:, None, None], -x, x), y


class TinyNet(torch.nn.Module):
    """A linear read-out over the flattened input."""

    def __init__(self, input_shape, num_classes, scale: float = 1.0):
        super().__init__()
        size = 1
        for dim in input_shape:
            size *= int(dim)
        self.scale = scale
        self.head = torch.nn.Linear(size, num_classes)

    def forward(self, x):
        return self.head(x.flatten(1) * self.scale)
