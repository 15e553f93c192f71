"""Three-layer CNNs for signals (CNN1d) and images (CNN2d).

Layout: conv k5 (same size) -> conv k3 stride 2 -> conv k3 stride 2, each followed by
[BatchNorm ->] ReLU, then flatten [-> Dropout] -> Linear. CNN1d with 32 channels and no
BatchNorm is the default demo model; keep its layout as is, the reference figures depend on it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import torch
from torch import nn

from periodscan.models._common import (
    check_bool,
    check_dropout,
    check_input,
    check_int,
    conv_and_norm,
    maybe_dropout,
)

#: (kernel, stride) of the three conv layers; padding is kernel // 2 throughout.
CONV_LAYOUT = ((5, 1), (3, 2), (3, 2))


def conv_out(size: int, kernel: int, stride: int, padding: int) -> int:
    """Output length of a convolution along one axis (formula from the torch Conv docs)."""
    return (size + 2 * padding - kernel) // stride + 1


class _ThreeConvNet(nn.Module):
    """Shared body of CNN1d and CNN2d; ``rank`` is ``len(input_shape)``."""

    rank: int

    def __init__(
        self,
        input_shape: Sequence[int],
        num_classes: int,
        channels: int = 32,
        batchnorm: bool = False,
        dropout: float = 0.0,
    ) -> None:
        super().__init__()
        name = type(self).__name__
        shape, num_classes = check_input(name, input_shape, num_classes, ranks=(self.rank,))
        channels = check_int("channels", channels, 1)
        batchnorm = check_bool("batchnorm", batchnorm)
        dropout = check_dropout(dropout)
        conv, norm = conv_and_norm(self.rank)

        layers: list[nn.Module] = []
        in_channels, size = shape[0], shape[1:]
        for kernel, stride in CONV_LAYOUT:
            layers.append(conv(in_channels, channels, kernel, stride=stride, padding=kernel // 2))
            if batchnorm:
                layers.append(norm(channels))
            layers.append(nn.ReLU())
            size = tuple(conv_out(n, kernel, stride, kernel // 2) for n in size)
            in_channels = channels
        self.features = nn.Sequential(*layers)
        self.dropout = maybe_dropout(dropout)
        self.head = nn.Linear(channels * math.prod(size), num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """(N, *input_shape) -> logits (N, num_classes)."""
        return self.head(self.dropout(self.features(x).flatten(1)))


class CNN1d(_ThreeConvNet):
    """Three-layer 1-D CNN for signals of shape (C, L).

    Parameters
    ----------
    input_shape : (C, L)
    num_classes : int
        Number of output logits (>= 2).
    channels : int
        Channels of every conv layer.
    batchnorm : bool
        BatchNorm1d after each conv, before its ReLU.
    dropout : float
        Dropout probability before the linear head, in [0, 1).
    """

    rank = 2


class CNN2d(_ThreeConvNet):
    """Three-layer 2-D CNN for images of shape (C, H, W); same arguments as :class:`CNN1d`."""

    rank = 3
