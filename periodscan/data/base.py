"""The in-memory dataset every loader returns and every other module consumes."""

from __future__ import annotations

import warnings
from collections.abc import Iterator
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
        """Raise DataError for anything that would make training meaningless.

        A class in ``[0, num_classes)`` with no training example only warns: the data is
        usable as given, but the class count is most likely not what the labels meant.
        """
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
        check_labels(self.name, self.y_train, self.y_test, self.num_classes)

    def train_examples(self, idx: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Training inputs (B, C, *spatial) and labels (B,) at indices ``idx``."""
        return self.x_train[idx], self.y_train[idx]

    def train_batches(
        self, batches: list[torch.Tensor]
    ) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
        """(inputs, labels) of each batch of training indices, in the order given."""
        for idx in batches:
            yield self.x_train[idx], self.y_train[idx]

    def test_batches(self, size: int) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
        """The held-out split in order, ``size`` examples at a time."""
        for begin in range(0, len(self.y_test), size):
            yield self.x_test[begin : begin + size], self.y_test[begin : begin + size]


def check_labels(name: str, y_train: torch.Tensor, y_test: torch.Tensor,
                 num_classes: int) -> None:
    """Raise DataError unless labels lie in [0, num_classes) and train holds 2+ classes.

    A class in ``[0, num_classes)`` with no training example only warns: the data is usable
    as given, but the class count is most likely not what the labels meant.
    """
    labels = torch.cat([y_train, y_test])
    if labels.min() < 0 or labels.max() >= num_classes:
        raise DataError(
            f"{name}: labels must lie in [0, {num_classes}); "
            f"got range [{int(labels.min())}, {int(labels.max())}]"
        )
    present = torch.unique(y_train)
    if present.numel() < 2:
        raise DataError(f"{name}: the training split holds a single class; need at least 2")
    if present.numel() < num_classes:
        message = _absent_classes(name, present.tolist(), torch.unique(y_test).tolist(),
                                  num_classes)
        warnings.warn(message, UserWarning, stacklevel=3)


def _absent_classes(name: str, train: list[int], test: list[int], num_classes: int) -> str:
    """One line naming the classes with no training example and the likely mistake.

    ``train`` and ``test`` are the sorted class ids that occur in each split. Labels that run
    from 1 to K read as K + 1 classes, class 0 never seen: the common slip. A ``num_classes``
    larger than the labels need is another; a class only in the held-out split a third.
    """
    missing = sorted(set(range(num_classes)) - set(train))
    labels = sorted(set(train) | set(test))
    low, high = labels[0], labels[-1]
    ids = ", ".join(map(str, missing[:10])) + (f" and {len(missing) - 10} more"
                                               if len(missing) > 10 else "")
    if set(missing) <= set(test):
        hint = ("they occur only in the held-out split; the training split needs examples of "
                "every class (is data.n_train too small?)")
    elif missing == list(range(low)) and labels == list(range(low, high + 1)):
        hint = (f"labels run {low}..{high} but class ids must be 0..K-1: subtract {low} "
                f"from every label")
    elif missing == list(range(high + 1, num_classes)):
        hint = f"labels stop at {high}: set num_classes to {high + 1} if there are no more classes"
    else:
        hint = ("class ids must be 0..K-1 with every class in the training split: renumber the "
                "labels (numpy.unique(labels, return_inverse=True) does), or raise data.n_train "
                "if a cap left them out")
    return (f"{name}: {len(missing)} of {num_classes} classes have no training example "
            f"(class {ids}); {hint}")
