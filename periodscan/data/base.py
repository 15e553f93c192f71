"""The in-memory dataset every loader returns and every other module consumes."""

from __future__ import annotations

from dataclasses import dataclass

import torch

from periodscan.errors import DataError


@dataclass
class TensorData:
    """Train and held-out tensors, already split and normalised.

    ``x_*`` are float32 of shape (N, C, L) for signals or (N, C, H, W) for images;
    ``y_*`` are int64 class indices in ``[0, num_classes)``. The held-out split is fixed for a
    given data config, so every run of a sweep is evaluated on the same examples (this is what
    makes damage and McNemar's test paired).
    """

    x_train: torch.Tensor
    y_train: torch.Tensor
    x_test: torch.Tensor
    y_test: torch.Tensor
    num_classes: int
    name: str = "data"

    def __post_init__(self) -> None:
        self.x_train = torch.as_tensor(self.x_train, dtype=torch.float32).contiguous()
        self.x_test = torch.as_tensor(self.x_test, dtype=torch.float32).contiguous()
        self.y_train = torch.as_tensor(self.y_train, dtype=torch.int64).contiguous()
        self.y_test = torch.as_tensor(self.y_test, dtype=torch.int64).contiguous()
        self.validate()

    @property
    def input_shape(self) -> tuple[int, ...]:
        """Shape of one example, (C, L) or (C, H, W)."""
        return tuple(self.x_train.shape[1:])

    def validate(self) -> None:
        """Raise DataError for anything that would make training meaningless."""
        splits = (("train", self.x_train, self.y_train), ("test", self.x_test, self.y_test))
        for part, x, y in splits:
            if x.ndim not in (3, 4):
                raise DataError(
                    f"{self.name}: {part} inputs must have shape (N, C, L) or (N, C, H, W); "
                    f"got shape {tuple(x.shape)}"
                )
            if len(x) != len(y):
                raise DataError(
                    f"{self.name}: {part} has {len(x)} inputs but {len(y)} labels; they must match"
                )
            if len(x) == 0:
                raise DataError(f"{self.name}: the {part} split is empty")
            if not torch.isfinite(x).all():
                raise DataError(f"{self.name}: {part} inputs contain NaN or infinite values")
        if self.x_train.shape[1:] != self.x_test.shape[1:]:
            raise DataError(
                f"{self.name}: train examples have shape {tuple(self.x_train.shape[1:])} but test "
                f"examples {tuple(self.x_test.shape[1:])}; they must match"
            )
        labels = torch.cat([self.y_train, self.y_test])
        if labels.min() < 0 or labels.max() >= self.num_classes:
            raise DataError(
                f"{self.name}: labels must lie in [0, {self.num_classes}); "
                f"got range [{int(labels.min())}, {int(labels.max())}]"
            )
        if torch.unique(self.y_train).numel() < 2:
            raise DataError(
                f"{self.name}: the training split holds a single class; need at least 2"
            )
