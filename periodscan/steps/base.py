"""What a training step is: the update one batch makes to the model.

The training loop owns the epoch (order, augmentation, deficit, learning rate, the ledger's
running means); a step owns the batch. It is handed the model in train mode, its optimizer,
the batch ``x`` (B, C, *spatial) and labels ``y`` (B,) already on the training device, and a
CPU ``torch.Generator`` keyed by (seed, epoch, "step"), one per epoch, shared by the epoch's
batches in order. It updates the model in place and returns ``(loss, logits)``.

Exact branching (a run forked from a checkpoint equals the run trained from scratch) holds
for a step that draws random numbers only from that generator (or through dropout, which the
loop reseeds every epoch) and keeps nothing between batches beyond what the model and the
optimizer hold: a branch builds its step afresh from the config.
"""

from __future__ import annotations

import torch


class Step:
    """Base class of built-in and user training steps (plug in your own with ``_target_``).

    Override :meth:`loss` to change only the loss: the default :meth:`__call__` runs the model,
    takes the loss, back-propagates, clips the gradient norm to ``max_grad_norm`` (when set)
    and steps the optimizer. Override :meth:`__call__` to change the update itself (several
    forward passes, a second loss); it must return

    - ``loss``: a scalar tensor, the batch's mean loss (the epoch's train_loss averages it,
      weighted by batch size; a non-finite value marks the run as diverged);
    - ``logits``: a (B, num_classes) tensor whose argmax is compared with ``y`` for train_acc.
    """

    #: Largest 2-norm of all gradients together before the optimizer steps; None: no clipping.
    max_grad_norm: float | None = None

    def __call__(self, model: torch.nn.Module, optimizer: torch.optim.Optimizer,
                 x: torch.Tensor, y: torch.Tensor,
                 generator: torch.Generator) -> tuple[torch.Tensor, torch.Tensor]:
        """One update on one batch; returns (scalar mean loss, logits (B, classes))."""
        logits = model(x)  # (B, classes)
        loss = self.loss(logits, y, generator)
        if loss.dim() != 0:  # backward() would only say "grad can be implicitly created..."
            raise ValueError(f"{type(self).__name__}.loss must return the batch's mean loss as "
                             f"a scalar tensor; got shape {tuple(loss.shape)}")
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        if self.max_grad_norm is not None:
            torch.nn.utils.clip_grad_norm_(model.parameters(), self.max_grad_norm)
        optimizer.step()
        return loss, logits

    def loss(self, logits: torch.Tensor, y: torch.Tensor,
             generator: torch.Generator) -> torch.Tensor:
        """The batch's scalar loss from logits (B, classes) and labels (B,)."""
        raise NotImplementedError(f"{type(self).__name__} must define loss() or __call__()")

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in vars(self).items() if not k.startswith("_"))
        return f"{type(self).__name__}({params})"
