"""The schedule's ordinary training augmentation: random shifts and horizontal flips.

It lives apart from the deficits because it is part of the clean recipe (the baseline trains
with it too); a deficit can only switch it off (``disables_augmentation``). All draws come from
the generator passed in, per example, without a Python loop over the batch.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F


def shift(x: torch.Tensor, offsets: torch.Tensor, max_shift: int) -> torch.Tensor:
    """Translate each example by integer ``offsets`` (N, D), filling vacated positions with 0.

    ``out[..., i] = x[..., i - offset]`` along every spatial axis; ``|offset| <= max_shift``.
    """
    n = len(x)
    for k, dim in enumerate(range(2, x.ndim)):
        pad = [0, 0] * (x.ndim - 1 - dim) + [max_shift, max_shift]  # F.pad lists axes last first
        moved = F.pad(x, pad).movedim(dim, -1)  # (N, ..., length + 2 max_shift)
        length = x.shape[dim]
        index = max_shift - offsets[:, k, None] + torch.arange(length)  # (N, length)
        index = index.view(n, *([1] * (moved.ndim - 2)), length).expand(*moved.shape[:-1], length)
        x = moved.gather(-1, index.to(x.device)).movedim(-1, dim)
    return x


def augment_batch(
    x: torch.Tensor, gen: torch.Generator, max_shift: int = 0, hflip: bool = False
) -> torch.Tensor:
    """Randomly shift (zero fill) and horizontally flip a ``(N, C, L)`` or ``(N, C, H, W)`` batch.

    Parameters
    ----------
    x : float tensor; the batch, unchanged in shape and dtype.
    gen : generator all draws come from (shifts first, then flips).
    max_shift : each spatial axis moves by an integer drawn uniformly from
        ``[-max_shift, max_shift]``, independently per example and axis; 0 = no shift.
    hflip : flip the last axis (W, or L for signals: time reversal) with probability 0.5.
    """
    if x.ndim not in (3, 4):
        raise ValueError(f"expected a (N, C, L) or (N, C, H, W) batch; got shape {tuple(x.shape)}")
    if max_shift < 0:
        raise ValueError(f"max_shift must be >= 0; got {max_shift}")
    if max_shift > 0:
        offsets = torch.randint(-max_shift, max_shift + 1, (len(x), x.ndim - 2), generator=gen)
        x = shift(x, offsets, max_shift)
    if hflip:
        flip = torch.rand(len(x), generator=gen) < 0.5
        x = torch.where(flip.view(-1, *([1] * (x.ndim - 1))).to(x.device), x.flip(-1), x)
    return x
