"""A curriculum as a deficit: while it is on, each epoch visits only the easy examples.

Used with ``design=removal`` the curriculum runs from epoch 0 until epoch t and training then
sees the whole set, so the sweep answers "when may the curriculum end?" against a baseline that
never had one.

Which examples are easy is decided once per run, by a rule of ours: a *reference model*, a
softmax regression on the standardised, flattened inputs, starts from zero weights and takes
``reference_epochs`` epochs of plain SGD in an order drawn from the per-run generator. An
example's easiness is the probability that model gives its true label. Within every class the
``keep`` easiest examples (a fraction, at least one) form the easy set, so each class stays in
the stream and the curriculum is about difficulty, not about which classes are seen.

The only randomness is the reference model's order, drawn from the generator ``prepare`` is
handed (keyed by (seed, ONCE, "deficit")), so every segment of a seed picks the same easy set
and a branch stays bit-identical to a run trained from scratch.
"""

from __future__ import annotations

import torch

from periodscan.data.base import TensorData
from periodscan.deficits.base import Deficit
from periodscan.params import COUNT, Interval, check_value

#: Batch size of the reference model's SGD, and the chunk size of its passes over the data.
REFERENCE_BATCH = 32
CHUNK = 4096


def _flat(data: TensorData, idx: torch.Tensor) -> torch.Tensor:
    """Training examples ``idx`` as float64 rows ``(B, D)``, read the way training reads them."""
    return data.x_train[idx].reshape(len(idx), -1).double()


def feature_scale(data: TensorData) -> tuple[torch.Tensor, torch.Tensor]:
    """Per-feature mean and standard deviation of the training inputs (a constant feature
    gets scale 1, so it standardises to zero)."""
    n = len(data.y_train)
    total = square = None
    for begin in range(0, n, CHUNK):
        x = _flat(data, torch.arange(begin, min(begin + CHUNK, n)))
        total = x.sum(0) if total is None else total + x.sum(0)
        square = (x * x).sum(0) if square is None else square + (x * x).sum(0)
    mean = total / n
    sd = (square / n - mean * mean).clamp_min(0).sqrt()
    return mean, torch.where(sd > 0, sd, torch.ones_like(sd))


def reference_scores(data: TensorData, gen: torch.Generator, epochs: int = 1,
                     lr: float = 0.1) -> torch.Tensor:
    """Probability of the true label under the reference model, one per training example.

    Softmax regression ``softmax(x W + b)`` on standardised inputs, ``W`` and ``b`` zero at
    first, trained by minibatch SGD on the mean cross-entropy (gradient ``x^T (p - onehot) / B``)
    for ``epochs`` passes in orders drawn from ``gen``. Pure tensor algebra in float64: no
    module initialisation and no draw from torch's global generator.
    """
    n, k = len(data.y_train), data.num_classes
    mean, sd = feature_scale(data)
    weights = torch.zeros(len(mean), k, dtype=torch.float64)
    bias = torch.zeros(k, dtype=torch.float64)
    eye = torch.eye(k, dtype=torch.float64)
    for _ in range(epochs):
        order = torch.randperm(n, generator=gen)
        for begin in range(0, n, REFERENCE_BATCH):
            idx = order[begin:begin + REFERENCE_BATCH]
            x = (_flat(data, idx) - mean) / sd  # (B, D)
            error = torch.softmax(x @ weights + bias, dim=1) - eye[data.y_train[idx]]  # (B, K)
            weights -= lr * (x.T @ error) / len(idx)
            bias -= lr * error.mean(0)
    scores = torch.empty(n, dtype=torch.float64)
    for begin in range(0, n, CHUNK):
        idx = torch.arange(begin, min(begin + CHUNK, n))
        probs = torch.softmax(((_flat(data, idx) - mean) / sd) @ weights + bias, dim=1)
        scores[idx] = probs.gather(1, data.y_train[idx, None]).squeeze(1)
    return scores


def easiest_per_class(scores: torch.Tensor, labels: torch.Tensor, keep: float) -> torch.Tensor:
    """Boolean mask of the ``keep`` highest-scoring examples of every class (at least one each).

    Ties go to the lower index (a stable sort), so the mask is a function of the scores alone.
    """
    mask = torch.zeros(len(labels), dtype=torch.bool)
    for c in torch.unique(labels):
        members = torch.nonzero(labels == c).squeeze(1)
        ranked = members[torch.sort(scores[members], descending=True, stable=True).indices]
        mask[ranked[:max(1, round(keep * len(members)))]] = True
    return mask


class Curriculum(Deficit):
    """Easy examples first: while on, an epoch visits only the easiest ``keep`` of each class.

    Easiness is the true-label probability of a reference softmax regression trained for
    ``reference_epochs`` epochs (learning rate ``reference_lr``) in an order drawn from the
    per-run generator; see the module docstring for the rule.
    """

    def __init__(self, keep: float = 0.5, reference_epochs: int = 1,
                 reference_lr: float = 0.1) -> None:
        self.keep = float(check_value("deficit.keep", keep,
                                      [Interval(float, 0.0, 1.0, closed="right")]))
        self.reference_epochs = check_value("deficit.reference_epochs", reference_epochs,
                                            [COUNT])
        self.reference_lr = float(check_value("deficit.reference_lr", reference_lr,
                                              [Interval(float, 0.0, None, closed="neither")]))
        self._easy: torch.Tensor | None = None

    @property
    def easy(self) -> torch.Tensor | None:
        """Boolean mask over the training set of the examples the curriculum shows (None
        before :meth:`prepare`)."""
        return self._easy

    def prepare(self, data: TensorData, gen: torch.Generator) -> None:
        scores = reference_scores(data, gen, self.reference_epochs, self.reference_lr)
        self._easy = easiest_per_class(scores, data.y_train, self.keep)

    def select(self, order: torch.Tensor, data: TensorData,
               gen: torch.Generator) -> torch.Tensor:
        if self._easy is None:
            raise RuntimeError("Curriculum.prepare() must be called before select()")
        return order[self._easy[order]]
