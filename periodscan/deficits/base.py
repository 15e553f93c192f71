"""What a deficit is: a temporary change to the training stream, applied batch by batch.

A deficit never sees global randomness. The training loop hands it a generator keyed by
(seed, epoch, "deficit") each epoch, and one keyed by (seed, ONCE, "deficit") once per run
for choices that must stay fixed while the deficit lasts (which examples carry noisy labels,
which shard is down). That is what keeps a branched run identical to one trained from scratch.
"""

from __future__ import annotations

import torch

from periodscan.data.base import TensorData


class Deficit:
    """Base class for built-in and user deficits (plug in your own with ``_target_``).

    Override :meth:`apply` to change a batch, :meth:`select` to change which examples the epoch
    sees, and :meth:`prepare` for per-run fixed choices. Set ``disables_augmentation = True`` for
    a deficit that switches the schedule's augmentation off.

    ``data`` may be in memory (:class:`periodscan.data.TensorData`) or streamed
    (:class:`periodscan.data.StreamData`): both have ``y_train``, ``num_classes``,
    ``input_shape`` and ``train_examples(idx)``; only in-memory data has ``x_train``.
    """

    disables_augmentation: bool = False

    def prepare(self, data: TensorData, gen: torch.Generator) -> None:
        """Called once per run, before the first deficit epoch, with a per-run generator."""

    def select(self, order: torch.Tensor, data: TensorData, gen: torch.Generator) -> torch.Tensor:
        """Return the training indices this epoch visits, in order. Default: all of ``order``."""
        return order

    def apply(
        self, x: torch.Tensor, y: torch.Tensor, idx: torch.Tensor, gen: torch.Generator
    ) -> tuple[torch.Tensor, torch.Tensor]:
        """Return the changed batch. ``idx`` are the batch's indices into the training set."""
        return x, y

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in vars(self).items() if not k.startswith("_"))
        return f"{type(self).__name__}({params})"
