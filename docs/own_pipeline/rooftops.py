"""A map-style Dataset of our own invention: aerial thumbnails of roofs, drawn on demand.

Each example is a 1 x 24 x 24 grey image of a roof seen from above, one of four shapes (flat,
gabled, hipped, domed), with random size, position, brightness and sensor noise. Example i is a
pure function of (split, i): the Dataset reads nothing from disk and holds nothing in memory
but the labels, like a Dataset over files too large for RAM would.
"""

from __future__ import annotations

import numpy as np
import torch
from torch.utils.data import Dataset

SHAPES = ("flat", "gabled", "hipped", "domed")
SIZE = 24


class Rooftops(Dataset):
    """``Rooftops(n, split)``: n thumbnails; the split only changes the random stream."""

    def __init__(self, n: int = 3000, split: str = "train"):
        self.n, self.offset = int(n), {"train": 0, "test": 10_000_000}[split]
        self.targets = [i % len(SHAPES) for i in range(self.n)]  # saves a pass over the data

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, i: int) -> tuple[torch.Tensor, int]:
        rng = np.random.default_rng(self.offset + i)
        label = self.targets[i]
        image = draw(label, rng) * rng.uniform(0.6, 1.2) + rng.normal(0, 0.35, (SIZE, SIZE))
        return torch.as_tensor(image, dtype=torch.float32)[None], label


def draw(shape: int, rng: np.random.Generator) -> np.ndarray:
    """Brightness of a roof of ``shape`` (index into SHAPES) on a dark ground."""
    half = rng.uniform(5, 9)
    cy, cx = rng.uniform(half + 1, SIZE - half - 1, size=2)
    y, x = np.mgrid[0:SIZE, 0:SIZE].astype(float)
    dy, dx = (y - cy) / half, (x - cx) / half
    inside = (np.abs(dy) <= 1) & (np.abs(dx) <= 1)
    if shape == 0:  # flat: one even surface
        roof = np.ones_like(dy)
    elif shape == 1:  # gabled: two slopes meeting at a ridge along x
        roof = 1 - np.abs(dy)
    elif shape == 2:  # hipped: four slopes meeting at a point
        roof = 1 - np.maximum(np.abs(dy), np.abs(dx))
    else:  # domed: a round roof
        inside = dy**2 + dx**2 <= 1
        roof = np.sqrt(np.clip(1 - dy**2 - dx**2, 0, 1))
    return np.where(inside, 0.3 + 0.7 * roof, 0.0)
