"""Training steps, torch.optim by ``_target_`` and the recipe checks at the boundary.

References: torch's own ``F.cross_entropy(label_smoothing=...)`` and the formula it documents
(Szegedy et al. 2016: the target is (1 - eps) one-hot + eps / K); ``torch.nn.utils.
clip_grad_norm_``'s documented rule (scale by max_norm / (total_norm + 1e-6) when the total
2-norm exceeds max_norm); torch's ``StepLR`` closed form lr * gamma ** (epoch // step_size).
"""

from __future__ import annotations

import copy
import hashlib
import json

import pytest
import torch
import torch.nn.functional as F
from omegaconf import OmegaConf

from periodscan.config import LATER_TRAINING_DEFAULTS, compose_config, config_dir, to_plain
from periodscan.data.mnist1d import load_mnist1d
from periodscan.engine import checkpoint
from periodscan.engine.schedule import (
    build_lr_scheduler,
    build_optimizer,
    check_recipe,
    epoch_lr,
)
from periodscan.engine.training import train_epoch
from periodscan.errors import ConfigError
from periodscan.jobs.fingerprint import code_digests
from periodscan.jobs.prepare import prepare
from periodscan.models import CNN1d
from periodscan.seeding import derive_seed, generator
from periodscan.steps import CrossEntropy, Step, build_step
from periodscan.steps.check import check_step_output
from periodscan.steps.check import check_training as settle_and_check

SCHEDULE = {"epochs": 4, "batch_size": 50,
            "optimizer": {"name": "sgd", "lr": 0.05, "momentum": 0.9, "weight_decay": 5e-4},
            "lr_schedule": {"kind": "exponential", "gamma": 0.97},
            "augment": {"max_shift": 0, "hflip": False}}


@pytest.fixture(scope="module")
def data():
    return load_mnist1d(n_train=200, n_test=50)


def _model(data, seed=0):
    torch.manual_seed(seed)
    return CNN1d(input_shape=data.input_shape, num_classes=data.num_classes, channels=8,
                 batchnorm=True, dropout=0.2)


# --- the built-in step ------------------------------------------------------------------------

@pytest.mark.parametrize("smoothing", [0.0, 0.1, 0.35])
def test_label_smoothing_matches_torch_and_the_formula(smoothing):
    logits = torch.randn(16, 5, generator=torch.Generator().manual_seed(3), dtype=torch.float64)
    y = torch.arange(16) % 5
    ours = CrossEntropy(label_smoothing=smoothing).loss(logits, y, torch.Generator())
    # Reference 1: torch's own keyword. Reference 2: the smoothed-target formula by hand.
    theirs = F.cross_entropy(logits, y, label_smoothing=smoothing)
    target = (1 - smoothing) * F.one_hot(y, 5).double() + smoothing / 5
    by_hand = -(target * logits.log_softmax(1)).sum(1).mean()
    assert torch.equal(ours, theirs)
    assert ours.item() == pytest.approx(by_hand.item(), rel=1e-12)


def test_clipping_follows_clip_grad_norm_rule():
    """One clipped SGD step equals the documented rescaling done by hand."""
    torch.manual_seed(0)
    net = torch.nn.Linear(6, 3)
    x, y = torch.randn(8, 6) * 10, torch.arange(8) % 3
    by_hand = copy.deepcopy(net)
    step = CrossEntropy(max_grad_norm=0.5)
    step(net, torch.optim.SGD(net.parameters(), lr=0.1), x, y, torch.Generator())

    F.cross_entropy(by_hand(x), y).backward()
    grads = [p.grad for p in by_hand.parameters()]
    total = torch.linalg.vector_norm(torch.stack([torch.linalg.vector_norm(g) for g in grads]))
    assert total > 0.5  # the rule must actually bite in this case
    with torch.no_grad():
        for p in by_hand.parameters():
            p -= 0.1 * p.grad * (0.5 / (total + 1e-6))
    for mine, ref in zip(net.parameters(), by_hand.parameters(), strict=True):
        torch.testing.assert_close(mine, ref, rtol=1e-6, atol=1e-7)


def test_default_step_is_the_old_update_bit_for_bit(data):
    """train_epoch with the default step equals the loop periodscan ran before steps existed."""
    mine, old = _model(data), _model(data)
    opt_mine = build_optimizer(mine.parameters(), SCHEDULE)
    opt_old = build_optimizer(old.parameters(), SCHEDULE)
    train_epoch(mine, opt_mine, data, SCHEDULE, seed=0, epoch=0, deficit=None)
    torch.manual_seed(derive_seed(0, 0, "torch"))
    for group in opt_old.param_groups:
        group["lr"] = 0.05
    old.train()
    order = torch.randperm(200, generator=generator(0, 0, "order"))
    for begin in range(0, 200, 50):
        idx = order[begin:begin + 50]
        loss = F.cross_entropy(old(data.x_train[idx]), data.y_train[idx])
        opt_old.zero_grad(set_to_none=True)
        loss.backward()
        opt_old.step()
    for a, b in zip(mine.state_dict().values(), old.state_dict().values(), strict=True):
        assert torch.equal(a, b)


def test_bad_built_in_values_are_refused():
    with pytest.raises(ConfigError, match=r"step\.label_smoothing.*\[0, 1\].*1\.5"):
        CrossEntropy(label_smoothing=1.5)
    with pytest.raises(ConfigError, match=r"step\.max_grad_norm.*0"):
        CrossEntropy(max_grad_norm=0)


def test_user_step_draws_only_from_its_generator():
    """Mixup's draws repeat with the generator's seed and change with it."""
    from user_steps import Mixup

    weights = [Mixup(0.4).mixing_weight(torch.Generator().manual_seed(s)) for s in (1, 1, 2)]
    assert weights[0] == weights[1] != weights[2]


# --- configs and identity ---------------------------------------------------------------------

def test_shipped_step_options_compose():
    for option, expected in [("cross_entropy", (0.0, None)), ("label_smoothing", (0.1, None)),
                             ("clip", (0.0, 1.0))]:
        step = to_plain(compose_config([f"step={option}"]))["step"]
        built = build_step(step)
        assert isinstance(built, CrossEntropy)
        assert (built.label_smoothing, built.max_grad_norm) == expected
    assert isinstance(build_step(None), CrossEntropy)


def test_default_step_is_what_identity_leaves_out():
    shipped = OmegaConf.to_container(OmegaConf.load(f"{config_dir()}/step/cross_entropy.yaml"))
    assert shipped == LATER_TRAINING_DEFAULTS["step"]
    assert to_plain(compose_config([]))["device"] == LATER_TRAINING_DEFAULTS["device"]


def _identity_before_steps(plain):
    """training_identity as computed before step and device existed (config.py at 8e1a324)."""
    keyed = {k: plain[k] for k in ("data", "model", "deficit", "schedule")}
    keyed["threads"] = plain["executor"].get("threads_per_worker", 1)
    keyed["engine"] = 1
    return hashlib.sha256(json.dumps(keyed, sort_keys=True, default=str).encode()).hexdigest()[:16]


@pytest.mark.parametrize("overrides", [["experiment=tiny"], ["experiment=tiny", "device=auto"],
                                       ["experiment=tiny", "step=cross_entropy"]])
def test_todays_configs_keep_their_identity(overrides):
    prep = prepare(overrides)
    assert prep.plain["device"] == ("cuda" if torch.cuda.is_available() else
                                    "mps" if torch.backends.mps.is_available() else "cpu")
    if prep.plain["device"] == "cpu":
        assert prep.identity == _identity_before_steps(prep.plain)


@pytest.mark.parametrize("overrides", [["step=clip"], ["step=label_smoothing"],
                                       ["schedule=rmsprop_step"]])
def test_a_different_recipe_is_a_different_identity(overrides):
    today = prepare(["experiment=tiny"]).identity
    assert prepare(["experiment=tiny", *overrides]).identity != today


def test_user_step_code_is_fingerprinted():
    plain = {"step": {"_target_": "user_steps.Mixup", "alpha": 0.4}}
    digests = code_digests(plain, ("step",))
    assert digests["step"]["target"] == "user_steps.Mixup"
    assert digests["step"]["file"] == "user_steps.py"


# --- torch.optim by _target_ ------------------------------------------------------------------

def _torch_schedule(**scheduler):
    schedule = copy.deepcopy(SCHEDULE)
    schedule["optimizer"] = {"_target_": "torch.optim.RMSprop", "lr": 0.01, "alpha": 0.9,
                             "centered": True}
    schedule["lr_schedule"] = None
    schedule["lr_scheduler"] = {"_target_": "torch.optim.lr_scheduler.StepLR", **scheduler}
    return schedule


def test_optimizer_and_scheduler_by_target(data):
    schedule = _torch_schedule(step_size=2, gamma=0.5)
    model = _model(data)
    optimizer = build_optimizer(model.parameters(), schedule)
    assert isinstance(optimizer, torch.optim.RMSprop)
    assert optimizer.defaults["alpha"] == 0.9 and optimizer.defaults["centered"] is True
    lr_scheduler = build_lr_scheduler(optimizer, schedule)
    lrs = [train_epoch(model, optimizer, data, schedule, 0, e, None, lr_scheduler=lr_scheduler)[0]
           for e in range(5)]
    # StepLR's closed form: lr * gamma ** (epoch // step_size).
    assert lrs == pytest.approx([0.01 * 0.5 ** (e // 2) for e in range(5)], rel=1e-12)


def test_built_in_rates_need_no_scheduler():
    optimizer = build_optimizer([torch.nn.Parameter(torch.zeros(2))], SCHEDULE)
    assert build_lr_scheduler(optimizer, SCHEDULE) is None
    assert epoch_lr(optimizer, SCHEDULE, 3) == pytest.approx(0.05 * 0.97 ** 3)
    assert optimizer.param_groups[0]["lr"] == pytest.approx(0.05 * 0.97 ** 3)


def test_scheduler_state_travels_in_the_checkpoint(data):
    schedule = _torch_schedule(step_size=1, gamma=0.5)
    model = _model(data)
    optimizer = build_optimizer(model.parameters(), schedule)
    lr_scheduler = build_lr_scheduler(optimizer, schedule)
    for epoch in range(3):
        train_epoch(model, optimizer, data, schedule, 0, epoch, None, lr_scheduler=lr_scheduler)
    state = checkpoint.from_bytes(checkpoint.to_bytes(model, optimizer, 3, lr_scheduler))
    fresh = _model(data, seed=9)
    fresh_opt = build_optimizer(fresh.parameters(), schedule)
    fresh_sched = build_lr_scheduler(fresh_opt, schedule)
    checkpoint.restore(state, fresh, fresh_opt, fresh_sched)
    assert fresh_sched.state_dict() == lr_scheduler.state_dict()
    assert fresh_opt.param_groups[0]["lr"] == pytest.approx(0.01 * 0.5 ** 3)
    with pytest.raises(RuntimeError, match="scheduler"):
        checkpoint.restore(state, fresh, fresh_opt, None)


@pytest.mark.parametrize("change, words", [
    ({"optimizer": {"name": "sgd", "_target_": "torch.optim.SGD", "lr": 0.1}},
     ["schedule.optimizer", "exactly one"]),
    ({"optimizer": {"lr": 0.1}}, ["schedule.optimizer", "exactly one"]),
    ({"lr_scheduler": {"_target_": "torch.optim.lr_scheduler.StepLR", "step_size": 2}},
     ["schedule.lr_schedule", "~schedule.lr_schedule"]),
    ({"lr_schedule": None}, ["schedule.lr_schedule", "set when"]),
])
def test_recipe_rules(change, words):
    schedule = {**copy.deepcopy(SCHEDULE), **change}
    with pytest.raises(ConfigError) as err:
        check_recipe(schedule)
    assert all(w in str(err.value) for w in words), str(err.value)


@pytest.mark.parametrize("target, words", [
    ("torch.nn.Linear", ["schedule.optimizer._target_", "torch.optim.Optimizer", "Linear"]),
    ("os.system", ["schedule.optimizer._target_", "os.system"]),
    ("torch.optim.NoSuchThing", ["cannot import", "NoSuchThing"]),
])
def test_optimizer_target_must_be_an_optimizer(target, words):
    schedule = {**copy.deepcopy(SCHEDULE), "optimizer": {"_target_": target, "lr": 0.1}}
    with pytest.raises(ConfigError) as err:
        build_optimizer([torch.nn.Parameter(torch.zeros(2))], schedule)
    assert all(w in str(err.value) for w in words), str(err.value)


def test_plateau_scheduler_is_refused():
    schedule = _torch_schedule()
    schedule["lr_scheduler"] = {"_target_": "torch.optim.lr_scheduler.ReduceLROnPlateau"}
    optimizer = build_optimizer([torch.nn.Parameter(torch.zeros(2))], schedule)
    with pytest.raises(ConfigError, match="ReduceLROnPlateau would need one"):
        build_lr_scheduler(optimizer, schedule)


# --- the boundary check -----------------------------------------------------------------------

class _Raw(Step):
    def __init__(self, out):
        self.out = out

    def __call__(self, model, optimizer, x, y, generator):
        return self.out


@pytest.mark.parametrize("out, words", [
    ((torch.zeros(4), torch.zeros(4, 3)), ["scalar", "(4,)"]),
    (torch.zeros(()), ["(loss, logits)", "tensor of shape ()"]),
    ((torch.zeros((), dtype=torch.int64), torch.zeros(4, 3)), ["floating", "int64"]),
    ((torch.zeros(()), torch.zeros(4, 2)), ["logits", "(4, 3)", "(4, 2)"]),
])
def test_step_output_is_checked(out, words):
    with pytest.raises(ConfigError) as err:
        check_step_output(out, batch=4, classes=3)
    assert all(w in str(err.value) for w in words), str(err.value)


def test_check_training_fills_defaults_and_refuses_a_non_step(data):
    model = _model(data)
    x, y = data.x_train[:2], data.y_train[:2]
    plain = {"schedule": copy.deepcopy(SCHEDULE)}
    settle_and_check(plain, model, x, y, data.num_classes)
    assert plain["step"] == LATER_TRAINING_DEFAULTS["step"] and plain["device"] == "cpu"
    plain["step"] = {"_target_": "torch.nn.Identity"}
    with pytest.raises(ConfigError, match=r"periodscan\.steps\.Step.*Identity"):
        settle_and_check(plain, model, x, y, data.num_classes)
    plain["step"] = {"_target_": "periodscan.steps.CrossEntropy", "smoothing": 0.1}
    with pytest.raises(ConfigError, match=r"^step: TypeError.*smoothing"):
        settle_and_check(plain, model, x, y, data.num_classes)
