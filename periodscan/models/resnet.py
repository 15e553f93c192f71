"""A small residual network for signals or images (picks 1-D or 2-D layers by input rank).

Stem conv -> three stages of basic blocks (widths w, 2w, 4w; stride 2 entering stages 2 and 3)
-> global average pooling [-> Dropout] -> Linear. Convs carry no bias because BatchNorm follows
each one (common practice).
"""

from __future__ import annotations

from collections.abc import Sequence

import torch
import torch.nn.functional as F
from torch import nn

from periodscan.models._common import (
    check_dropout,
    check_input,
    check_int,
    check_int_list,
    conv_and_norm,
    maybe_dropout,
)


class BasicBlock(nn.Module):
    """Two 3-wide convs with BatchNorm and an identity (or 1-wide conv projection) shortcut."""

    def __init__(self, rank: int, in_channels: int, out_channels: int, stride: int) -> None:
        super().__init__()
        conv, norm = conv_and_norm(rank)
        self.conv1 = conv(in_channels, out_channels, 3, stride=stride, padding=1, bias=False)
        self.bn1 = norm(out_channels)
        self.conv2 = conv(out_channels, out_channels, 3, padding=1, bias=False)
        self.bn2 = norm(out_channels)
        self.shortcut: nn.Module = nn.Identity()
        if stride != 1 or in_channels != out_channels:
            self.shortcut = nn.Sequential(
                conv(in_channels, out_channels, 1, stride=stride, bias=False), norm(out_channels)
            )

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        out = F.relu(self.bn1(self.conv1(x)))
        out = self.bn2(self.conv2(out))
        return F.relu(out + self.shortcut(x))


class TinyResNet(nn.Module):
    """Residual classifier for (C, L) signals or (C, H, W) images.

    Parameters
    ----------
    input_shape : (C, L) or (C, H, W)
    num_classes : int
        Number of output logits (>= 2).
    width : int
        Channels of the stem and first stage; later stages double it.
    blocks : sequence of 3 int
        Number of basic blocks in each stage.
    dropout : float
        Dropout probability before the linear head, in [0, 1).
    """

    def __init__(
        self,
        input_shape: Sequence[int],
        num_classes: int,
        width: int = 16,
        blocks: Sequence[int] = (1, 1, 1),
        dropout: float = 0.0,
    ) -> None:
        super().__init__()
        shape, num_classes = check_input("TinyResNet", input_shape, num_classes, ranks=(2, 3))
        width = check_int("width", width, 1)
        blocks = check_int_list("blocks", blocks, 1, length=3)
        dropout = check_dropout(dropout)
        rank = len(shape)
        conv, norm = conv_and_norm(rank)

        self.stem = nn.Sequential(
            conv(shape[0], width, 3, padding=1, bias=False), norm(width), nn.ReLU()
        )
        stages: list[nn.Module] = []
        in_channels = width
        for i, count in enumerate(blocks):
            out_channels = width * 2**i
            for j in range(count):
                stride = 2 if i > 0 and j == 0 else 1
                stages.append(BasicBlock(rank, in_channels, out_channels, stride))
                in_channels = out_channels
        self.stages = nn.Sequential(*stages)
        self.dropout = maybe_dropout(dropout)
        self.head = nn.Linear(in_channels, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """(N, *input_shape) -> logits (N, num_classes)."""
        features = self.stages(self.stem(x))
        pooled = features.flatten(2).mean(dim=2)  # global average pool: (N, 4w, ...) -> (N, 4w)
        return self.head(self.dropout(pooled))
