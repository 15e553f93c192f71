"""The engine's records as plain dataclasses: what goes to a worker and what comes back.

Nothing here imports torch, so the ledger (and anything that only reads a finished sweep) can
name these records without paying for the training stack. Every field is a plain picklable
value; checkpoints travel as bytes. Fields are keyword-only: a call site names what it sets.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any


@dataclass(kw_only=True)
class EpochRecord:
    """Metrics of one finished epoch; accuracies are fractions in [0, 1]."""

    epoch: int
    lr: float
    train_loss: float
    train_acc: float
    test_loss: float
    test_acc: float
    deficit_on: bool
    seconds: float


@dataclass(kw_only=True)
class SegmentJob:
    """Everything a worker needs to train epochs ``[begin, end)`` of one seed."""

    segment_id: str
    config: dict[str, Any]  # plain containers: data, model, deficit, schedule
    seed: int
    begin: int
    end: int
    deficit_on: bool
    parent_checkpoint: bytes | None
    keep_checkpoint: bool
    evaluate_at_end: bool
    threads: int = 1
    monitor: dict[str, Any] | None = None  # ``_target_`` config of a Monitor (periodscan.monitors)


@dataclass(kw_only=True)
class SegmentResult:
    """What comes back: per-epoch metrics, the end checkpoint and the final evaluation."""

    segment_id: str
    epochs: list[EpochRecord] = field(default_factory=list)
    checkpoint: bytes | None = None
    test_acc: float | None = None
    test_loss: float | None = None
    correct: bytes | None = None  # np.packbits of the per-example correctness vector
    n_test: int = 0
    diverged_at: int | None = None
    seconds: float = 0.0
    error: str | None = None
    extras: list[tuple[int, str, float]] = field(default_factory=list)  # (epoch, name, value)

    @property
    def status(self) -> str:
        """'failed' (raised), 'diverged' (non-finite loss) or 'done'."""
        if self.error:
            return "failed"
        return "diverged" if self.diverged_at is not None else "done"
