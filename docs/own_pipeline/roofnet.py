"""The team's own model: a small CNN that takes periodscan's input_shape / num_classes."""

from __future__ import annotations

from torch import nn


class RoofNet(nn.Module):
    def __init__(self, input_shape, num_classes, width: int = 16):
        super().__init__()
        channels, height, width_px = input_shape
        self.features = nn.Sequential(  # (B, C, 24, 24) -> (B, 2*width, 6, 6)
            nn.Conv2d(channels, width, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2),
            nn.Conv2d(width, 2 * width, 3, padding=1), nn.ReLU(), nn.MaxPool2d(2))
        flat = 2 * width * (height // 4) * (width_px // 4)
        self.head = nn.Sequential(nn.Flatten(), nn.Linear(flat, num_classes))

    def forward(self, x):
        return self.head(self.features(x))
