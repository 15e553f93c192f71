"""Multi-layer perceptron: flattens any input, then Linear [-> BatchNorm] -> ReLU [-> Dropout]."""

from __future__ import annotations

import math
from collections.abc import Sequence

import torch
from torch import nn

from periodscan.models._common import (
    check_bool,
    check_dropout,
    check_input,
    check_int_list,
    maybe_dropout,
)


class MLP(nn.Module):
    """Fully connected classifier for inputs of any shape.

    Parameters
    ----------
    input_shape : sequence of int
        Shape of one example; it is flattened, so any rank works.
    num_classes : int
        Number of output logits (>= 2).
    hidden : sequence of int
        Width of each hidden layer; an empty list gives a linear (softmax-regression) model.
    dropout : float
        Dropout probability after each hidden ReLU, in [0, 1).
    batchnorm : bool
        Add BatchNorm1d between each hidden Linear and its ReLU.
    """

    def __init__(
        self,
        input_shape: Sequence[int],
        num_classes: int,
        hidden: Sequence[int] = (256, 256),
        dropout: float = 0.0,
        batchnorm: bool = False,
    ) -> None:
        super().__init__()
        shape, num_classes = check_input("MLP", input_shape, num_classes, ranks=None)
        hidden = check_int_list("hidden", hidden, 1)
        dropout = check_dropout(dropout)
        batchnorm = check_bool("batchnorm", batchnorm)

        layers: list[nn.Module] = [nn.Flatten()]
        width = math.prod(shape)
        for size in hidden:
            layers.append(nn.Linear(width, size))
            if batchnorm:
                layers.append(nn.BatchNorm1d(size))
            layers += [nn.ReLU(), maybe_dropout(dropout)]
            width = size
        layers.append(nn.Linear(width, num_classes))
        self.net = nn.Sequential(*layers)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """(N, *input_shape) -> logits (N, num_classes)."""
        return self.net(x)
