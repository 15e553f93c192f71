"""Learning-rate schedules against torch's own schedulers (the reference implementation)."""

from __future__ import annotations

import math

import pytest
import torch

from periodscan.engine.schedule import build_optimizer, lr_at


def _schedule(kind: str, **lr_schedule) -> dict:
    return {"epochs": 20, "batch_size": 10,
            "optimizer": {"name": "sgd", "lr": 0.1, "momentum": 0.9, "weight_decay": 0.0},
            "lr_schedule": {"kind": kind, **lr_schedule}}


def _torch_lrs(make_scheduler, epochs: int = 20) -> list[float]:
    """Learning rate in effect during each epoch under a torch.optim.lr_scheduler."""
    param = torch.nn.Parameter(torch.zeros(1))
    opt = torch.optim.SGD([param], lr=0.1)
    sched = make_scheduler(opt)
    lrs = []
    for _ in range(epochs):
        lrs.append(opt.param_groups[0]["lr"])
        opt.step()
        sched.step()
    return lrs


@pytest.mark.parametrize(
    "kind, settings, reference",
    [
        # Reference: torch.optim.lr_scheduler.ExponentialLR, StepLR, CosineAnnealingLR.
        ("exponential", {"gamma": 0.9},
         lambda o: torch.optim.lr_scheduler.ExponentialLR(o, gamma=0.9)),
        ("step", {"gamma": 0.1, "step_size": 7},
         lambda o: torch.optim.lr_scheduler.StepLR(o, step_size=7, gamma=0.1)),
        ("cosine", {"min_lr": 0.001},
         lambda o: torch.optim.lr_scheduler.CosineAnnealingLR(o, T_max=20, eta_min=0.001)),
        ("constant", {}, lambda o: torch.optim.lr_scheduler.ConstantLR(o, factor=1.0)),
    ],
)
def test_lr_matches_torch_scheduler(kind, settings, reference):
    ours = [lr_at(e, _schedule(kind, **settings)) for e in range(20)]
    theirs = _torch_lrs(reference)
    assert ours == pytest.approx(theirs, rel=1e-9, abs=1e-12)


def test_cosine_holds_min_lr_past_the_schedule():
    """fixed_recovery runs may train past schedule.epochs; the rate stays at its floor."""
    schedule = _schedule("cosine", min_lr=0.001)
    assert lr_at(25, schedule) == pytest.approx(0.001)


def test_warmup_scales_linearly():
    schedule = _schedule("constant", warmup_epochs=4)
    assert [lr_at(e, schedule) for e in range(5)] == pytest.approx([0.025, 0.05, 0.075, 0.1, 0.1])
    assert not math.isnan(lr_at(0, schedule))


@pytest.mark.parametrize("name, cls", [("sgd", torch.optim.SGD), ("adam", torch.optim.Adam)])
def test_build_optimizer(name, cls):
    schedule = _schedule("constant")
    schedule["optimizer"]["name"] = name
    opt = build_optimizer([torch.nn.Parameter(torch.zeros(2))], schedule)
    assert isinstance(opt, cls)
