"""Training steps as a user outside the project would write them (named by ``_target_``).

pytest puts tests/ on ``sys.path`` and worker processes inherit it; the CLI tests put it on
PYTHONPATH. ``Mixup`` is a real recipe (Zhang et al. 2018, "mixup: Beyond Empirical Risk
Minimization", ICLR): it draws its mixing weight and partner order from the generator it is
handed, which is what keeps a branched run exact. ``PerExampleLoss`` forgets to reduce the loss
over the batch, a mistake the sweep must refuse before it starts.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F

from periodscan.steps import Step


class Mixup(Step):
    """Train on convex mixtures of example pairs: x' = lam x + (1 - lam) x[perm], same for y.

    ``lam`` ~ Beta(alpha, alpha); the partner order and ``lam`` come from the step's generator.
    """

    def __init__(self, alpha: float = 0.4, max_grad_norm: float | None = None):
        self.alpha = alpha
        self.max_grad_norm = max_grad_norm

    def __call__(self, model, optimizer, x, y, generator):
        perm = torch.randperm(len(x), generator=generator).to(x.device)
        lam = self.mixing_weight(generator)
        logits = model(lam * x + (1.0 - lam) * x[perm])
        loss = lam * F.cross_entropy(logits, y) + (1.0 - lam) * F.cross_entropy(logits, y[perm])
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        if self.max_grad_norm is not None:
            torch.nn.utils.clip_grad_norm_(model.parameters(), self.max_grad_norm)
        optimizer.step()
        return loss, logits

    def mixing_weight(self, generator: torch.Generator) -> float:
        """A Beta(alpha, alpha) draw by Johnk's rejection method (Johnk 1964): with U, V
        uniform, X = U^(1/alpha), Y = V^(1/alpha), accept when X + Y <= 1 and return X/(X+Y)."""
        while True:
            u, v = torch.rand(2, generator=generator, dtype=torch.float64).tolist()
            a, b = u ** (1.0 / self.alpha), v ** (1.0 / self.alpha)
            if 0.0 < a + b <= 1.0:
                return a / (a + b)


class PerExampleLoss(Step):
    """Cross-entropy left per example (reduction='none'): a loss of shape (B,), not a scalar."""

    def loss(self, logits, y, generator):
        return F.cross_entropy(logits, y, reduction="none")
