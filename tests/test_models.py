"""Tests for the built-in models and their option files in configs/model/."""

from __future__ import annotations

import copy
import pickle
from pathlib import Path

import pytest
import torch
from hydra import compose, initialize_config_dir
from hydra.errors import InstantiationException
from hydra.utils import instantiate
from torch import nn

from periodscan.errors import ConfigError
from periodscan.models import MLP, CNN1d, CNN2d, TinyResNet

CONFIG_DIR = Path(__file__).resolve().parents[1] / "configs"
OPTIONS = sorted(p.stem for p in (CONFIG_DIR / "model").glob("*.yaml"))
SHAPES = [(1, 40), (3, 16), (1, 8, 8), (3, 16, 16)]
NUM_CLASSES = 10

# Input ranks (len(input_shape)) each built-in accepts, written out rather than read from code.
ACCEPTED_RANKS = {"MLP": {2, 3}, "CNN1d": {2}, "CNN2d": {3}, "TinyResNet": {2, 3}}


@pytest.fixture(autouse=True, scope="module")
def one_torch_thread():
    """Tiny models run fastest on one thread (no contention on a busy machine), as in the engine."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def _compose_all() -> dict:
    """The ``model`` node exactly as Hydra composes it from each configs/model/<option>.yaml."""
    with initialize_config_dir(config_dir=str(CONFIG_DIR), version_base="1.3"):
        return {o: compose(overrides=[f"+model={o}"]).model for o in OPTIONS}


COMPOSED = _compose_all()  # composed once: compose costs ~0.1 s a call


def model_config(option: str):
    return copy.deepcopy(COMPOSED[option])


def target_name(cfg) -> str:
    return cfg._target_.rsplit(".", 1)[-1]


def build(option: str, shape: tuple[int, ...], seed: int = 0) -> nn.Module:
    """Seed, then build the way the engine does."""
    torch.manual_seed(seed)
    return instantiate(model_config(option), input_shape=shape, num_classes=NUM_CLASSES)


def applicable() -> list[tuple[str, tuple[int, ...]]]:
    return [
        (option, shape)
        for option in OPTIONS
        for shape in SHAPES
        if len(shape) in ACCEPTED_RANKS[target_name(model_config(option))]
    ]


def batch(shape: tuple[int, ...], n: int = 4) -> torch.Tensor:
    return torch.randn((n, *shape), generator=torch.Generator().manual_seed(123))


def test_option_files_present() -> None:
    assert {"mlp", "cnn1d", "cnn1d_bn", "cnn2d", "tiny_resnet"} <= set(OPTIONS)


@pytest.mark.parametrize("option", OPTIONS)
def test_option_targets_a_known_model(option: str) -> None:
    cfg = model_config(option)
    assert target_name(cfg) in ACCEPTED_RANKS
    assert "input_shape" not in cfg and "num_classes" not in cfg  # the engine passes these


@pytest.mark.parametrize("option", OPTIONS)
@pytest.mark.parametrize("shape", SHAPES, ids=str)
def test_forward_backward_or_rank_error(option: str, shape: tuple[int, ...]) -> None:
    name = target_name(model_config(option))
    if len(shape) not in ACCEPTED_RANKS[name]:
        with pytest.raises(InstantiationException) as info:
            build(option, shape)
        cause = info.value.__cause__
        assert isinstance(cause, ConfigError)
        assert name in str(cause) and str(shape) in str(cause) and "model.input_shape" in str(cause)
        return
    model = build(option, shape).train()
    out = model(batch(shape))
    assert out.shape == (4, NUM_CLASSES) and out.dtype == torch.float32
    assert torch.isfinite(out).all()
    nn.functional.cross_entropy(out, torch.arange(4)).backward()
    grads = [p.grad for p in model.parameters()]
    assert all(g is not None and torch.isfinite(g).all() for g in grads)
    assert sum(float(g.abs().sum()) for g in grads) > 0


@pytest.mark.parametrize(("option", "shape"), applicable(), ids=str)
def test_pickle_round_trip(option: str, shape: tuple[int, ...]) -> None:
    model = build(option, shape)
    model.train()(batch(shape, 8))  # move BatchNorm running statistics off their defaults
    clone = pickle.loads(pickle.dumps(model))
    original, restored = model.state_dict(), clone.state_dict()
    assert original.keys() == restored.keys()
    assert all(torch.equal(original[k], restored[k]) for k in original)
    x = batch(shape)
    assert torch.equal(model.eval()(x), clone.eval()(x))


@pytest.mark.parametrize(("option", "shape"), applicable(), ids=str)
def test_same_seed_same_initial_weights(option: str, shape: tuple[int, ...]) -> None:
    first, second, other = (build(option, shape, seed=s).state_dict() for s in (7, 7, 8))
    assert all(torch.equal(first[k], second[k]) for k in first)
    assert not all(torch.equal(first[k], other[k]) for k in first)


@pytest.mark.parametrize(("option", "shape"), applicable(), ids=str)
def test_forward_draws_from_global_rng_only_through_dropout(
    option: str, shape: tuple[int, ...]
) -> None:
    # Exact branching needs forward passes to leave torch's global RNG alone, except dropout.
    model = build(option, shape)
    x = batch(shape)
    has_dropout = any(isinstance(m, nn.Dropout) for m in model.modules())
    for mode in ("eval", "train"):
        getattr(model, mode)()
        state = torch.get_rng_state()
        model(x)
        unchanged = torch.equal(state, torch.get_rng_state())
        assert unchanged or (mode == "train" and has_dropout)


# --- parameter counts by hand: Conv weight = out*in*k (+ out bias), Linear = in*out + out,
# --- BatchNorm = 2*channels (weight and bias); formulas from the torch.nn layer docs.


def n_params(model: nn.Module) -> int:
    return sum(p.numel() for p in model.parameters())


def test_cnn1d_parameter_count_by_hand() -> None:
    # channels=32, input (1, 40), 10 classes. Lengths: 40 -(k5,p2)-> 40 -(k3,s2,p1)-> 20 -> 10.
    conv1 = 32 * 1 * 5 + 32  # 192
    conv2 = 32 * 32 * 3 + 32  # 3104
    conv3 = 32 * 32 * 3 + 32  # 3104
    head = (32 * 10) * 10 + 10  # 3210
    assert conv1 + conv2 + conv3 + head == 9610
    assert n_params(CNN1d((1, 40), 10, channels=32)) == 9610


def test_cnn2d_parameter_count_by_hand() -> None:
    # channels=8, input (3, 16, 16), 5 classes. Sides: 16 -> 16 -> 8 -> 4.
    conv1 = 8 * 3 * 5 * 5 + 8  # 608
    conv2 = 8 * 8 * 3 * 3 + 8  # 584
    head = (8 * 4 * 4) * 5 + 5  # 645
    assert n_params(CNN2d((3, 16, 16), 5, channels=8)) == conv1 + 2 * conv2 + head == 2421


def test_mlp_parameter_count_by_hand() -> None:
    # hidden (256, 256), input (1, 40) flattened to 40, 10 classes; BatchNorm adds 2*256 per layer.
    linear = (40 * 256 + 256) + (256 * 256 + 256) + (256 * 10 + 10)  # 78858
    assert n_params(MLP((1, 40), 10)) == linear == 78858
    assert n_params(MLP((1, 40), 10, batchnorm=True)) == linear + 2 * (2 * 256)


@pytest.mark.parametrize(("shape", "k"), [((1, 40), 3), ((3, 8, 8), 9)], ids=["1d", "2d"])
def test_tiny_resnet_parameter_count_by_hand(shape: tuple[int, ...], k: int) -> None:
    # width 4, one block per stage, bias-free convs; k = kernel elements (3 or 3*3).
    c = shape[0]
    stem = 4 * c * k + 2 * 4
    stage1 = 2 * (4 * 4 * k) + 2 * (2 * 4)  # two convs + two BatchNorms, identity shortcut
    stage2 = 8 * 4 * k + 8 * 8 * k + 3 * (2 * 8) + 8 * 4  # + 1-wide projection conv and its BN
    stage3 = 16 * 8 * k + 16 * 16 * k + 3 * (2 * 16) + 16 * 8
    head = 16 * 10 + 10
    expected = stem + stage1 + stage2 + stage3 + head
    assert expected == {3: 2046, 9: 5214}[k]
    assert n_params(TinyResNet(shape, 10, width=4, blocks=(1, 1, 1))) == expected


def test_cnn1d_matches_layout_written_with_torch_modules() -> None:
    # The demo model, written straight from its specification with torch's own modules.
    reference = nn.Sequential(
        nn.Conv1d(1, 32, 5, padding=2), nn.ReLU(),
        nn.Conv1d(32, 32, 3, stride=2, padding=1), nn.ReLU(),
        nn.Conv1d(32, 32, 3, stride=2, padding=1), nn.ReLU(),
        nn.Flatten(), nn.Linear(320, 10),
    )  # fmt: skip
    model = build("cnn1d", (1, 40))
    ours = list(model.parameters())
    theirs = list(reference.parameters())
    assert [p.shape for p in ours] == [p.shape for p in theirs]
    with torch.no_grad():
        for a, b in zip(ours, theirs, strict=True):
            b.copy_(a)
    x = batch((1, 40), 16)
    torch.testing.assert_close(model(x), reference(x), rtol=0, atol=0)


def test_tiny_resnet_picks_layers_by_rank() -> None:
    kinds_1d = {type(m) for m in TinyResNet((1, 40), 10).modules()}
    kinds_2d = {type(m) for m in TinyResNet((1, 8, 8), 10).modules()}
    assert {nn.Conv1d, nn.BatchNorm1d} <= kinds_1d and nn.Conv2d not in kinds_1d
    assert {nn.Conv2d, nn.BatchNorm2d} <= kinds_2d and nn.Conv1d not in kinds_2d


# --- validation


@pytest.mark.parametrize(
    ("cls", "shape", "kwargs", "field"),
    [
        (CNN1d, (1, 40), {"channels": 0}, "model.channels"),
        (CNN1d, (1, 40), {"channels": "32"}, "model.channels"),
        (CNN1d, (1, 40), {"channels": 2.0}, "model.channels"),
        (CNN2d, (1, 8, 8), {"channels": True}, "model.channels"),
        (CNN1d, (1, 40), {"batchnorm": "yes"}, "model.batchnorm"),
        (CNN1d, (1, 40), {"dropout": 1.0}, "model.dropout"),
        (CNN2d, (1, 8, 8), {"dropout": -0.1}, "model.dropout"),
        (MLP, (1, 40), {"hidden": [256, 0]}, "model.hidden"),
        (MLP, (1, 40), {"hidden": 256}, "model.hidden"),
        (MLP, (1, 40), {"batchnorm": 1}, "model.batchnorm"),
        (TinyResNet, (1, 40), {"width": 0}, "model.width"),
        (TinyResNet, (1, 40), {"blocks": [1, 1]}, "model.blocks"),
        (TinyResNet, (1, 40), {"blocks": [1, 0, 1]}, "model.blocks"),
        (CNN1d, (1, 40), {"num_classes": 1}, "model.num_classes"),
        (MLP, (0, 40), {}, "model.input_shape"),
        (MLP, (), {}, "model.input_shape"),
        (TinyResNet, (1, 2, 3, 4), {}, "model.input_shape"),
        (CNN1d, (1, 8, 8), {}, "model.input_shape"),
        (CNN2d, (1, 40), {}, "model.input_shape"),
    ],
)
def test_bad_arguments_name_the_field(cls, shape, kwargs, field) -> None:
    kwargs = {"num_classes": NUM_CLASSES, **kwargs}
    with pytest.raises(ConfigError, match=f"'{field}'"):
        cls(shape, **kwargs)


def test_rank_error_names_model_and_shape() -> None:
    with pytest.raises(ConfigError) as info:
        CNN2d((1, 40), 10)
    message = str(info.value)
    assert "CNN2d" in message and "(C, H, W)" in message and "(1, 40)" in message


def test_yaml_lists_are_accepted() -> None:
    # Hydra hands YAML lists over as ListConfig; the model must store plain tuples of ints.
    cfg = model_config("mlp")
    assert type(cfg.hidden).__name__ == "ListConfig"
    model = instantiate(cfg, input_shape=(1, 40), num_classes=3)
    assert [m.out_features for m in model.modules() if isinstance(m, nn.Linear)] == [256, 256, 3]


# --- dropout


@pytest.mark.parametrize(
    ("make", "shape"),
    [
        (lambda: build("cnn1d_bn", (1, 40)), (1, 40)),
        (lambda: MLP((3, 16), 10, dropout=0.5), (3, 16)),
        (lambda: CNN2d((1, 8, 8), 10, dropout=0.5), (1, 8, 8)),
        (lambda: TinyResNet((1, 8, 8), 10, dropout=0.5), (1, 8, 8)),
    ],
    ids=["cnn1d_bn", "mlp", "cnn2d", "tiny_resnet"],
)
def test_dropout_acts_in_train_mode_only(make, shape) -> None:
    model, x = make(), batch(shape)
    model.eval()
    assert torch.equal(model(x), model(x))
    model.train()
    assert not torch.equal(model(x), model(x))
