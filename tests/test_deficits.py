"""Tests of the deficit kernels and classes against direct or reference computations."""

from __future__ import annotations

import pickle
from pathlib import Path

import numpy as np
import pytest
import torch
from hydra.utils import instantiate
from omegaconf import OmegaConf
from scipy import ndimage, stats

import periodscan.deficits as deficits
from periodscan.data.base import TensorData
from periodscan.deficits import functional as K
from periodscan.errors import ConfigError
from periodscan.seeding import ONCE, generator

CONFIGS = sorted((Path(__file__).parents[1] / "configs" / "deficit").glob("*.yaml"))
# Deficits whose output depends on no random draw at all.
DETERMINISTIC = {"blur", "downsample", "contrast", "vflip", "no_augmentation"}


def _gen(seed: int) -> torch.Generator:
    return torch.Generator().manual_seed(seed)


def _data(shape: tuple[int, ...], n: int = 60, classes: int = 5, seed: int = 0) -> TensorData:
    g = _gen(seed)
    y = torch.arange(n) % classes
    return TensorData(torch.randn(n, *shape, generator=g), y, torch.randn(4, *shape, generator=g),
                      torch.arange(4) % classes, classes)


# ---------------------------------------------------------------- kernels against references


@pytest.mark.parametrize("shape", [(4, 2, 31), (3, 2, 7), (2, 3, 17, 12), (2, 1, 5, 9)])
@pytest.mark.parametrize("sigma", [0.6, 1.0, 2.5])
def test_blur_matches_scipy_gaussian_filter(shape, sigma):
    x = torch.randn(*shape, generator=_gen(1))
    axes = tuple(range(2, len(shape)))
    # Reference: scipy.ndimage.gaussian_filter; mode="mirror" is torch's "reflect" (scipy docs,
    # "mirror: d c b | a b c d | c b a"); truncate=4.0 is scipy's default radius rule. The
    # shapes include axes shorter than the radius (sigma 2.5 -> radius 10 on lengths 5, 7, 9).
    want = ndimage.gaussian_filter(x.double().numpy(), sigma, mode="mirror", truncate=4.0,
                                   axes=axes)
    got = deficits.Blur(sigma).apply(x, torch.zeros(shape[0]), None, _gen(0))[0]
    assert got.dtype == torch.float32 and got.shape == x.shape
    np.testing.assert_allclose(got.numpy(), want, atol=1e-5, rtol=0)


def _block_means(a: np.ndarray, f: int, axis: int) -> np.ndarray:
    """Means of consecutive blocks of f along axis; the last block may be shorter."""
    n = a.shape[axis]
    return np.stack([np.take(a, range(i, min(i + f, n)), axis=axis).mean(axis=axis)
                     for i in range(0, n, f)], axis=axis)


def _linear_resize(a: np.ndarray, n: int, axis: int) -> np.ndarray:
    """Linear resize with the half-pixel convention: output i reads input (i + .5) m / n - .5.

    Convention of torch.nn.functional.interpolate(align_corners=False) (torch docs); np.interp
    clamps outside the ends, which is torch's edge behaviour too.
    """
    m = a.shape[axis]
    src = (np.arange(n) + 0.5) * m / n - 0.5
    return np.apply_along_axis(lambda row: np.interp(src, np.arange(m), row), axis, a)


def _nearest_resize(a: np.ndarray, n: int, axis: int) -> np.ndarray:
    """torch's legacy "nearest": output i reads input floor(i m / n) (torch interpolate docs)."""
    m = a.shape[axis]
    return np.take(a, np.floor(np.arange(n) * m / n).astype(int), axis=axis)


@pytest.mark.parametrize(
    "shape, factor, mode",
    [((3, 2, 40), 4, "linear"), ((3, 2, 42), 4, "linear"), ((2, 1, 10), 4, "nearest"),
     ((2, 3, 12, 8), 4, "nearest"), ((2, 3, 12, 8), 2, "linear"), ((2, 1, 11, 7), 3, "linear"),
     ((2, 1, 3, 12), 4, "linear")],
)
def test_downsample_matches_numpy_block_means(shape, factor, mode):
    x = torch.randn(*shape, generator=_gen(2))
    # Reference: direct numpy computation (block means, then resize each axis in turn; bilinear
    # interpolation is separable).
    want = x.double().numpy()
    axes = range(2, len(shape))
    for ax in axes:
        want = _block_means(want, factor, ax)
    resize = _linear_resize if mode == "linear" else _nearest_resize
    for ax in axes:
        want = resize(want, shape[ax], ax)
    got = deficits.Downsample(factor, mode).apply(x, None, None, _gen(0))[0]
    np.testing.assert_allclose(got.numpy(), want, atol=1e-5, rtol=0)


@pytest.mark.parametrize("shape", [(5, 2, 30), (4, 2, 11, 16)])
@pytest.mark.parametrize("keep", [0.3, 0.75, 1.0])
def test_crop_matches_scipy_map_coordinates(shape, keep):
    x = torch.randn(*shape, generator=_gen(3))
    sizes = shape[2:]
    start = torch.rand(shape[0], len(sizes), generator=_gen(4), dtype=torch.float64)
    start = start * torch.tensor(sizes) * (1 - keep)
    got = K.resized_crop(x, start, keep).numpy()
    for i in range(shape[0]):
        # Reference: scipy.ndimage.map_coordinates, order=1 (linear), mode="nearest" (edge value)
        # at the half-pixel positions start + (j + .5) keep - .5 (align_corners=False convention).
        axes = [start[i, d].item() + (np.arange(n) + 0.5) * keep - 0.5 for d, n in enumerate(sizes)]
        coords = np.meshgrid(*axes, indexing="ij")
        for c in range(shape[1]):
            plane = x[i, c].double().numpy()
            want = ndimage.map_coordinates(plane, coords, order=1, mode="nearest")
            np.testing.assert_allclose(got[i, c], want, atol=1e-5, rtol=0)
    if keep == 1.0:
        np.testing.assert_allclose(got, x.numpy(), atol=1e-5, rtol=0)


@pytest.mark.parametrize("shape", [(50, 2, 20), (50, 3, 10, 8)])
def test_occlusion_zeroes_one_box_of_the_right_side(shape):
    x = torch.randn(*shape, generator=_gen(5)) + 10.0  # no exact zeros in the input
    out = deficits.Occlusion(0.3).apply(x, None, None, _gen(6))[0].numpy()
    sides = [max(1, round(0.3 * n)) for n in shape[2:]]
    corners = set()
    for i in range(shape[0]):
        zero = out[i] == 0
        assert (zero == zero[0]).all()  # the same box in every channel
        np.testing.assert_array_equal(out[i][~zero], x[i].numpy()[~zero])  # rest untouched
        box = np.argwhere(zero[0])
        lo, hi = box.min(axis=0), box.max(axis=0) + 1
        assert list(hi - lo) == sides and zero[0].sum() == np.prod(sides)  # a full box
        corners.add(tuple(lo))
    assert len(corners) > 5  # position varies per example


def test_noise_is_gaussian_with_the_given_std():
    x = torch.randn(200, 2, 50, generator=_gen(7))
    out = deficits.Noise(0.3).apply(x, None, None, _gen(8))[0]
    # Reference: scipy.stats.kstest against the standard normal; p > 1e-3 for this fixed seed.
    z = ((out - x) / 0.3).double().flatten().numpy()
    assert stats.kstest(z, "norm").pvalue > 1e-3


@pytest.mark.parametrize("shape", [(4, 2, 15), (3, 3, 6, 5)])
@pytest.mark.parametrize("factor", [0.0, 0.4, 1.0])
def test_contrast_is_a_blend_toward_the_example_mean(shape, factor):
    x = torch.randn(*shape, generator=_gen(9))
    a = x.double().numpy()
    # Reference: direct numpy computation of m + f (x - m), m the mean of each example.
    m = a.reshape(len(a), -1).mean(axis=1).reshape(-1, *[1] * (a.ndim - 1))
    got = deficits.Contrast(factor).apply(x, None, None, _gen(0))[0]
    np.testing.assert_allclose(got.numpy(), m + factor * (a - m), atol=1e-6, rtol=0)


def test_vertical_flip_flips_images_and_negates_signals():
    img, sig = torch.randn(2, 3, 4, 5), torch.randn(2, 3, 7)
    flip = deficits.VerticalFlip()
    np.testing.assert_array_equal(flip.apply(img, None, None, _gen(0))[0].numpy(),
                                  np.flip(img.numpy(), axis=2))  # numpy: flip along H
    np.testing.assert_array_equal(flip.apply(sig, None, None, _gen(0))[0].numpy(), -sig.numpy())


# ---------------------------------------------------------------- label and stream deficits


def _relabel(deficit, data, epoch, batch=500):
    """All training labels as the deficit sees them in one epoch, visited in shuffled batches."""
    gen = generator(0, epoch, "deficit")
    order = deficit.select(torch.randperm(len(data.y_train), generator=_gen(epoch)), data, gen)
    y = data.y_train.clone()
    for idx in order.split(batch):
        y[idx] = deficit.apply(data.x_train[idx], data.y_train[idx], idx, gen)[1]
    return y


@pytest.mark.parametrize("rate", [0.1, 0.45])
def test_label_noise_count_is_binomial_and_labels_are_wrong(rate):
    n, classes = 20_000, 7
    data = TensorData(torch.zeros(n, 1, 4), torch.arange(n) % classes, torch.zeros(2, 1, 4),
                      torch.tensor([0, 1]), classes)
    noise = deficits.LabelNoise(rate)
    noise.prepare(data, generator(0, ONCE, "deficit"))
    y = _relabel(noise, data, epoch=3)
    changed = y != data.y_train
    k = int(changed.sum())
    # Reference: exact binomial test, scipy.stats.binomtest (fixed seed, so p is fixed too).
    assert stats.binomtest(k, n, rate).pvalue > 1e-3
    # The wrong class is uniform over the other classes: chi-square goodness of fit
    # (scipy.stats.chisquare) on the label shift (y_new - y_old) mod k, which must be 1..k-1.
    shift = ((y - data.y_train) % classes)[changed]
    counts = torch.bincount(shift, minlength=classes).numpy()
    assert counts[0] == 0
    assert stats.chisquare(counts[1:]).pvalue > 1e-3
    assert torch.equal(_relabel(noise, data, epoch=9), y)  # fixed for the run
    assert torch.equal(_relabel(noise, data, epoch=3, batch=77), y)  # batching does not matter


def test_label_noise_resampled_each_epoch_changes_but_repeats():
    data = _data((1, 8), n=2000)
    noise = deficits.LabelNoise(0.3, resample_each_epoch=True)
    noise.prepare(data, generator(0, ONCE, "deficit"))
    first = _relabel(noise, data, epoch=1)
    assert not torch.equal(first, _relabel(noise, data, epoch=2))
    assert torch.equal(first, _relabel(noise, data, epoch=1, batch=33))


@pytest.mark.parametrize("classes", [2, 3, 10])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_label_permutation_is_a_derangement(classes, seed):
    data = _data((1, 8), n=40, classes=classes)
    perm = deficits.LabelPermutation()
    perm.prepare(data, _gen(seed))
    mapping = perm.apply(None, torch.arange(classes), None, _gen(0))[1]
    assert sorted(mapping.tolist()) == list(range(classes))  # a bijection
    assert (mapping != torch.arange(classes)).all()  # no class keeps its label
    y = perm.apply(None, data.y_train, None, _gen(0))[1]
    assert torch.equal(y, mapping[data.y_train])


def test_class_dropout_removes_exactly_the_named_classes():
    data = _data((1, 8), n=100, classes=5)
    drop = deficits.ClassDropout(classes=[1, 3])
    drop.prepare(data, _gen(0))
    order = torch.randperm(100, generator=_gen(1))
    kept = drop.select(order, data, _gen(2))
    want = order[(data.y_train[order] != 1) & (data.y_train[order] != 3)]
    assert torch.equal(kept, want)  # same order, only those classes gone


def test_class_dropout_draws_count_classes_when_none_named():
    data = _data((1, 8), n=100, classes=6)
    drop = deficits.ClassDropout(count=2)
    drop.prepare(data, _gen(0))
    kept = drop.select(torch.arange(100), data, _gen(1))
    assert len(set(data.y_train[kept].tolist())) == 4 and len(kept) < 100


@pytest.mark.parametrize("fraction", [0.0, 0.25, 0.5])
def test_data_outage_drops_a_fixed_shard(fraction):
    n = 400
    data = _data((1, 8), n=n)
    outage = deficits.DataOutage(fraction)
    outage.prepare(data, generator(0, ONCE, "deficit"))
    epochs = []
    for epoch in (2, 5):
        order = torch.randperm(n, generator=_gen(epoch))
        kept = outage.select(order, data, generator(0, epoch, "deficit"))
        assert torch.equal(kept, order[torch.isin(order, kept)])  # order kept
        epochs.append(set(kept.tolist()))
    assert len(epochs[0]) == n - round(fraction * n)
    assert epochs[0] == epochs[1]  # the same shard is down in every deficit epoch


# ---------------------------------------------------------------- every registered deficit


def _run(deficit, data, seed):
    """prepare / select / apply as the engine calls them; returns (order, x, y)."""
    deficit.prepare(data, generator(seed, ONCE, "deficit"))
    gen = generator(seed, 4, "deficit")
    order = deficit.select(torch.randperm(len(data.y_train), generator=_gen(0)), data, gen)
    idx = order[:16]
    x, y = deficit.apply(data.x_train[idx], data.y_train[idx], idx, gen)
    return order, x, y


def _same(a, b):
    return all(torch.equal(u, v) for u, v in zip(a, b, strict=True))


@pytest.mark.parametrize("shape", [(2, 24), (3, 12, 10)], ids=["1d", "2d"])
@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: p.stem)
def test_registered_deficit_contract(path, shape):
    data = _data(shape)
    deficit = instantiate(OmegaConf.load(path))
    assert isinstance(deficit, deficits.Deficit)
    fresh = pickle.loads(pickle.dumps(deficit))
    rng = torch.get_rng_state()
    order, x, y = _run(deficit, data, seed=0)
    assert torch.equal(torch.get_rng_state(), rng)  # the global torch RNG was never drawn from
    assert x.shape == (16, *shape) and x.dtype == torch.float32
    assert y.shape == (16,) and y.dtype == torch.int64
    assert set(order.tolist()) <= set(range(len(data.y_train)))
    assert _same(_run(fresh, data, seed=0), (order, x, y))  # pickled before prepare
    prepared = pickle.loads(pickle.dumps(deficit))
    assert _same(_run(prepared, data, seed=0), (order, x, y))  # pickled after
    outputs = [_run(deficit, data, seed) for seed in range(4)]
    assert _same(outputs[0], (order, x, y))
    differ = any(not _same(outputs[0], out) for out in outputs[1:])
    assert differ == (path.stem not in DETERMINISTIC)


def test_every_public_deficit_has_a_config():
    targets = {OmegaConf.load(p)["_target_"].rsplit(".", 1)[1] for p in CONFIGS}
    assert targets == set(deficits.__all__) - {"Deficit"}
    for path in CONFIGS:
        assert path.read_text().startswith("# "), f"{path.name} needs a one-line description"


def test_no_augmentation_only_switches_augmentation_off():
    x, y = torch.randn(3, 1, 5), torch.tensor([0, 1, 0])
    d = deficits.NoAugmentation()
    assert d.disables_augmentation and not deficits.Blur(1.0).disables_augmentation
    assert d.apply(x, y, torch.arange(3), _gen(0)) == (x, y)


@pytest.mark.parametrize(
    "cls, kwargs, field",
    [(deficits.Blur, {"sigma": 0}, "deficit.sigma"),
     (deficits.Blur, {"sigma": "2"}, "deficit.sigma"),
     (deficits.Downsample, {"factor": 1}, "deficit.factor"),
     (deficits.Downsample, {"factor": 2.5}, "deficit.factor"),
     (deficits.Downsample, {"mode": "cubic"}, "deficit.mode"),
     (deficits.Crop, {"keep": 0.0}, "deficit.keep"),
     (deficits.Crop, {"keep": 1.5}, "deficit.keep"),
     (deficits.Occlusion, {"size": -0.1}, "deficit.size"),
     (deficits.Noise, {"std": float("nan")}, "deficit.std"),
     (deficits.Contrast, {"factor": 1.2}, "deficit.factor"),
     (deficits.LabelNoise, {"rate": 1.5}, "deficit.rate"),
     (deficits.LabelNoise, {"rate": True}, "deficit.rate"),
     (deficits.LabelNoise, {"rate": 0.2, "resample_each_epoch": "yes"},
      "deficit.resample_each_epoch"),
     (deficits.ClassDropout, {"classes": []}, "deficit.classes"),
     (deficits.ClassDropout, {"classes": [1, 1]}, "deficit.classes"),
     (deficits.ClassDropout, {"classes": [-1]}, "deficit.classes"),
     (deficits.ClassDropout, {"count": 0}, "deficit.count"),
     (deficits.DataOutage, {"fraction": 1.0}, "deficit.fraction")],
)
def test_bad_parameters_name_the_field(cls, kwargs, field):
    with pytest.raises(ConfigError, match=f"'{field}' parameter must be"):
        cls(**kwargs)


def test_label_noise_message_has_the_standard_form():
    with pytest.raises(ConfigError) as err:
        deficits.LabelNoise(1.5)
    assert str(err.value) == ("The 'deficit.rate' parameter must be a float in [0, 1]. "
                              "Got 1.5 instead.")


@pytest.mark.parametrize(
    "kwargs, field", [({"classes": [0, 5]}, "deficit.classes"),
                      ({"classes": [0, 1, 2, 3, 4]}, "deficit.classes"),
                      ({"count": 5}, "deficit.count")],
)
def test_class_dropout_checks_against_the_data_in_prepare(kwargs, field):
    drop = deficits.ClassDropout(**kwargs)
    with pytest.raises(ConfigError, match=f"'{field}'"):
        drop.prepare(_data((1, 8), classes=5), _gen(0))
