"""Tests of the data loaders against the packages' own data, numpy, scipy, PIL and sklearn."""

from __future__ import annotations

import glob
import os
import random
import struct
import warnings

import numpy as np
import pytest
import torch
from hydra.utils import instantiate
from omegaconf import OmegaConf
from PIL import Image

from periodscan.data import (
    StreamData,
    TensorData,
    load_digits,
    load_image_folder,
    load_mnist1d,
    load_npz,
    load_patterns,
    load_torchvision,
    load_waves,
)
from periodscan.data import mnist1d as m1d
from periodscan.data.prep import to_gray
from periodscan.errors import ConfigError, DataError

CONFIG_DIR = os.path.join(os.path.dirname(__file__), os.pardir, "configs", "data")


@pytest.fixture(autouse=True)
def _private_cache(tmp_path, monkeypatch):
    """Keep mnist1d's disk cache inside the test's folder."""
    monkeypatch.setenv("PERIODSCAN_CACHE", str(tmp_path / "cache"))


def assert_same(a: TensorData, b: TensorData) -> None:
    for field in ("x_train", "y_train", "x_test", "y_test"):
        assert torch.equal(getattr(a, field), getattr(b, field)), field
    assert (a.num_classes, a.name) == (b.num_classes, b.name)


def unstandardize_like(raw_train: np.ndarray, raw_test: np.ndarray):
    """numpy reference of train-only standardisation with a single channel."""
    mean, std = raw_train.astype(np.float64).mean(), raw_train.astype(np.float64).std()
    return (raw_train - mean) / std, (raw_test - mean) / std


# ---------------------------------------------------------------- digits (scikit-learn)


def test_digits_shapes_classes_and_stratification():
    from sklearn.datasets import load_digits as sk_load_digits

    d = load_digits()
    # scikit-learn's user guide: the digits set has 1797 samples, 10 classes, 8x8 images.
    assert len(d.x_train) + len(d.x_test) == 1797
    assert d.input_shape == (1, 8, 8) and d.num_classes == 10
    # train_test_split rounds the test share up: ceil(0.25 * 1797) = 450 (sklearn docs).
    assert len(d.x_test) == 450
    counts = np.bincount(sk_load_digits().target, minlength=10)
    test_counts = np.bincount(d.y_test.numpy(), minlength=10)
    # Stratified: every class keeps its share of the test set to within one example.
    assert np.all(np.abs(test_counts - 0.25 * counts) <= 1)


def test_digits_standardised_with_train_statistics_only():
    from sklearn.datasets import load_digits as sk_load_digits
    from sklearn.model_selection import train_test_split

    bunch = sk_load_digits()
    # Reference split: the same sklearn call the loader documents, on the raw images.
    tr, te = train_test_split(
        np.arange(1797), test_size=0.25, random_state=3, stratify=bunch.target
    )
    tr, te = np.sort(tr), np.sort(te)
    ref_train, ref_test = unstandardize_like(bunch.images[tr], bunch.images[te])
    d = load_digits(split_seed=3)
    np.testing.assert_allclose(d.x_train[:, 0].numpy(), ref_train, atol=1e-5)
    np.testing.assert_allclose(d.x_test[:, 0].numpy(), ref_test, atol=1e-5)
    np.testing.assert_array_equal(d.y_test.numpy(), bunch.target[te])
    assert abs(float(d.x_test.mean())) > 1e-4  # test statistics were not used


@pytest.mark.parametrize("mode", ["nearest", "bilinear"])
def test_digits_upsample_matches_reference(mode):
    from scipy.ndimage import zoom

    d1, d2 = load_digits(), load_digits(upsample=2, upsample_mode=mode)
    assert d2.input_shape == (1, 16, 16) and d2.name == "digits16"
    small = d1.x_train[:, 0].numpy().astype(np.float64)
    if mode == "nearest":  # reference: numpy pixel repetition
        ref = small.repeat(2, axis=1).repeat(2, axis=2)
    else:  # reference: scipy zoom, linear, pixel-edge aligned grid, edge values extended
        ref = np.stack([zoom(im, 2, order=1, grid_mode=True, mode="nearest") for im in small])
    # Standardisation is affine, so up to it the loader must match the reference.
    ref = (ref - ref.mean()) / ref.std()
    np.testing.assert_allclose(d2.x_train[:, 0].numpy(), ref, atol=1e-4)


def test_digits_deterministic_and_split_seed_matters():
    assert_same(load_digits(), load_digits())
    assert not torch.equal(load_digits(split_seed=1).y_test, load_digits().y_test)


# ---------------------------------------------------------------- mnist1d (the package itself)


def test_mnist1d_default_shapes():
    d = load_mnist1d()
    assert d.x_train.shape == (4000, 1, 40) and d.x_test.shape == (1000, 1, 40)
    assert d.num_classes == 10 and d.name == "mnist1d"


def test_mnist1d_equals_package_generator():
    from mnist1d.data import get_dataset_args, make_dataset

    # Reference: the package's own generator with the same size, split and seed.
    args = get_dataset_args()
    args.num_samples, args.train_split, args.seed = 500, 0.8, 7
    ref = make_dataset(args)
    d = load_mnist1d(n_train=400, n_test=100, seed=7)
    ref_train, ref_test = unstandardize_like(ref["x"], ref["x_test"])
    np.testing.assert_allclose(d.x_train[:, 0].numpy(), ref_train, atol=1e-5)
    np.testing.assert_allclose(d.x_test[:, 0].numpy(), ref_test, atol=1e-5)
    np.testing.assert_array_equal(d.y_train.numpy(), ref["y"])
    np.testing.assert_array_equal(d.y_test.numpy(), ref["y_test"])


def test_mnist1d_leaves_global_rng_alone():
    np.random.seed(123)
    random.seed(123)
    before = np.random.get_state(), random.getstate(), torch.get_rng_state()
    load_mnist1d(n_train=100, n_test=50, seed=3, disk_cache=False)
    np_after = np.random.get_state()
    assert all(np.array_equal(a, b) for a, b in zip(before[0], np_after, strict=True))
    assert random.getstate() == before[1]
    assert torch.equal(torch.get_rng_state(), before[2])


def test_mnist1d_memory_cache_returns_independent_copies():
    a = load_mnist1d(n_train=100, n_test=50, seed=5)
    a.x_train.zero_()
    b = load_mnist1d(n_train=100, n_test=50, seed=5)
    assert b.x_train.abs().sum() > 0


def test_mnist1d_disk_cache_is_used_and_survives_corruption(tmp_path, monkeypatch):
    # __wrapped__ skips the in-process cache, so each call below goes to disk or regenerates.
    load = m1d._load_cached.__wrapped__
    first = load(100, 50, 11, True)
    files = glob.glob(str(tmp_path / "cache" / "*"))
    assert len(files) == 1 and files[0].endswith(".npz")  # no temporary file left behind

    with monkeypatch.context() as patch:
        patch.setattr(m1d, "_generate", lambda args: pytest.fail("cache file not used"))
        assert_same(load(100, 50, 11, True), first)

    with open(files[0], "wb") as f:
        f.write(b"not an npz")
    assert_same(load(100, 50, 11, True), first)  # regenerated, and the file rewritten
    assert m1d._read_npz(files[0]) is not None


def test_mnist1d_odd_sizes_are_exact():
    d = load_mnist1d(n_train=123, n_test=45, seed=2, disk_cache=False)
    assert (len(d.x_train), len(d.x_test)) == (123, 45)


# ---------------------------------------------------------------- procedural (our own data)

PROCEDURAL = [(load_waves, (1, 64)), (load_patterns, (1, 16, 16))]


@pytest.mark.parametrize("loader, shape", PROCEDURAL)
def test_procedural_shape_balance_determinism(loader, shape):
    d = loader(n_train=403, n_test=200)
    assert d.input_shape == shape and d.num_classes == 8
    for y in (d.y_train, d.y_test):
        counts = np.bincount(y.numpy(), minlength=8)
        assert counts.max() - counts.min() <= 1
    assert_same(d, loader(n_train=403, n_test=200))
    assert not torch.equal(d.x_train, loader(n_train=403, n_test=200, seed=1).x_train)
    # Standardised on the training split (common practice: zero mean, unit variance).
    assert abs(float(d.x_train.mean())) < 1e-5 and abs(float(d.x_train.std()) - 1) < 1e-3


def _magnitude_spectrum(x: np.ndarray) -> np.ndarray:
    return np.abs(np.fft.rfftn(x, axes=tuple(range(2, x.ndim)))).reshape(len(x), -1)


def _pool4(x: np.ndarray) -> np.ndarray:
    if x.ndim == 3:
        return x.reshape(*x.shape[:2], -1, 4).mean(-1)
    n, c, h, w = x.shape
    return x.reshape(n, c, h // 4, 4, w // 4, 4).mean((3, 5))


@pytest.mark.parametrize("loader, coarse", [(load_waves, lambda y: y // 2),
                                            (load_patterns, lambda y: y // 4)])
def test_procedural_fine_detail_carries_label(loader, coarse):
    """A reference classifier (sklearn logistic regression on shift-invariant |FFT|) nearly
    solves the clean task; after 4x average pooling it loses what only fine detail told."""
    from sklearn.linear_model import LogisticRegression

    d = loader(n_train=1200, n_test=600)
    x_tr, x_te, y_tr, y_te = (t.numpy() for t in (d.x_train, d.x_test, d.y_train, d.y_test))
    acc = {}
    for label, f in (("clean", lambda x: x), ("pooled", _pool4)):
        model = LogisticRegression(max_iter=3000).fit(_magnitude_spectrum(f(x_tr)), y_tr)
        acc[label] = model.predict(_magnitude_spectrum(f(x_te)))
    assert (acc["clean"] == y_te).mean() > 0.95
    assert (acc["pooled"] == y_te).mean() < (acc["clean"] == y_te).mean() - 0.2
    if loader is load_waves:  # the coarse shape still separates class pairs after pooling
        assert (coarse(acc["pooled"]) == coarse(y_te)).mean() > 0.95


# ---------------------------------------------------------------- npz (numpy round trip)

LAYOUTS = [  # (stored shape, expected (C, ...) per example, reference to channels-first)
    ((30, 20), (1, 20), lambda a: a[:, None]),
    ((30, 2, 20), (2, 20), lambda a: a),
    ((30, 6, 5), (1, 6, 5), lambda a: a[:, None]),
    ((30, 3, 6, 5), (3, 6, 5), lambda a: a),
    ((30, 6, 5, 3), (3, 6, 5), lambda a: a.transpose(0, 3, 1, 2)),
    ((30, 6, 5, 1), (1, 6, 5), lambda a: a.transpose(0, 3, 1, 2)),
]


@pytest.mark.parametrize("shape, expect, ref", LAYOUTS)
def test_npz_layouts_round_trip(tmp_path, shape, expect, ref):
    rng = np.random.default_rng(0)
    arrays = {
        "x_train": rng.standard_normal(shape).astype(np.float32),
        "y_train": np.arange(30) % 3,
        "x_test": rng.standard_normal((12, *shape[1:])).astype(np.float32),
        "y_test": np.arange(12) % 3,
    }
    np.savez(tmp_path / "d.npz", **arrays)
    d = load_npz(str(tmp_path / "d.npz"), standardize=False)
    assert d.input_shape == expect and d.num_classes == 3 and d.name == "d"
    np.testing.assert_array_equal(d.x_train.numpy(), ref(arrays["x_train"]))
    np.testing.assert_array_equal(d.x_test.numpy(), ref(arrays["x_test"]))
    np.testing.assert_array_equal(d.y_test.numpy(), arrays["y_test"])
    s = load_npz(str(tmp_path / "d.npz"))
    axes = (0,) + tuple(range(2, s.x_train.ndim))
    np.testing.assert_allclose(s.x_train.numpy().mean(axis=axes), 0, atol=1e-5)
    np.testing.assert_allclose(s.x_train.numpy().std(axis=axes), 1, atol=1e-4)


def test_npz_splits_when_no_test_arrays(tmp_path):
    x, y = np.random.default_rng(1).standard_normal((50, 8)), np.repeat([0, 1], 25)
    np.savez(tmp_path / "d.npz", inputs=x, labels=y.astype(np.float64))  # whole-valued floats
    d = load_npz(str(tmp_path / "d.npz"), x_train="inputs", y_train="labels")
    assert (len(d.x_train), len(d.x_test)) == (40, 10)
    assert np.bincount(d.y_test.numpy()).tolist() == [5, 5]  # stratified
    assert_same(d, load_npz(str(tmp_path / "d.npz"), x_train="inputs", y_train="labels"))


def _npz_case(tmp_path, **arrays):
    path = tmp_path / "bad.npz"
    np.savez(path, **arrays)
    return str(path)


X, Y = np.zeros((10, 4)), np.arange(10) % 2


@pytest.mark.parametrize(
    "arrays, kwargs, needles",
    [
        ({"x_train": X}, {}, ["y_train", "x_train", "bad.npz"]),
        ({"x_train": X, "y_train": Y, "x_test": X}, {}, ["y_test", "bad.npz"]),
        ({"x_train": X, "y_train": Y[:9]}, {}, ["y_train", "(10,)", "(9,)"]),
        ({"x_train": X, "y_train": Y + 0.5}, {}, ["y_train", "integers"]),
        ({"x_train": X, "y_train": Y - 1}, {}, ["y_train", ">= 0"]),
        ({"x_train": X, "y_train": np.zeros(10, int)}, {}, ["y_train", "single class"]),
        ({"x_train": np.zeros(10), "y_train": Y}, {}, ["x_train", "2 to 4 axes"]),
        ({"x_train": X, "y_train": Y}, {"layout": "NCHW"}, ["x_train", "NCHW", "4-D"]),
    ],
)
def test_npz_errors_name_the_array(tmp_path, arrays, kwargs, needles):
    with pytest.raises(DataError) as err:
        load_npz(_npz_case(tmp_path, **arrays), **kwargs)
    for needle in needles:
        assert needle in str(err.value)


def test_npz_missing_and_unreadable_files(tmp_path):
    with pytest.raises(DataError, match="data.path: file .*nope.npz' does not exist"):
        load_npz(str(tmp_path / "nope.npz"))
    (tmp_path / "junk.npz").write_text("hello")
    with pytest.raises(DataError, match="junk.npz"):
        load_npz(str(tmp_path / "junk.npz"))
    with pytest.raises(ConfigError, match="num_classes"):
        load_npz(_npz_case(tmp_path, x_train=X, y_train=Y * 3), num_classes=3)


# ---------------------------------------------------------------- image folders (PIL)


def _write_tree(root, sizes=((6, 5),) * 5, classes=("b_dark", "a_bright")) -> dict[str, int]:
    """Class "a_bright" gets bright images, "b_dark" dark ones; returns file -> expected label."""
    expected = {}
    for name in classes:
        os.makedirs(root / name, exist_ok=True)
        for i, (w, h) in enumerate(sizes):
            level = 200 if "bright" in name else 30
            pixels = np.full((h, w, 3), level + i, dtype=np.uint8)
            pixels[0, 0] = (i * 10, 255, 0)
            Image.fromarray(pixels).save(root / name / f"{i}.png")
            expected[str(root / name / f"{i}.png")] = sorted(classes).index(name)
    return expected


def test_image_folder_labels_follow_sorted_names(tmp_path):
    _write_tree(tmp_path)
    d = load_image_folder(str(tmp_path), image_size=4, test_fraction=0.2)
    assert d.input_shape == (3, 4, 4) and d.num_classes == 2 and len(d.x_test) == 2
    brightness = d.x_train.mean(dim=(1, 2, 3))
    # "a_bright" sorts first, so label 0 must be the bright class.
    assert brightness[d.y_train == 0].min() > brightness[d.y_train == 1].max()
    g = load_image_folder(str(tmp_path), image_size=None, grayscale=True)
    assert g.input_shape == (1, 5, 6)


def test_image_folder_pixels_match_pil(tmp_path):
    expected = _write_tree(tmp_path)
    d = load_image_folder(str(tmp_path), image_size=3, test_root=str(tmp_path))
    files = sorted(expected)  # the loader reads classes, then files, in sorted order
    # Reference: PIL's own conversion and bilinear resize of each file.
    ref = np.stack(
        [np.asarray(Image.open(f).convert("RGB").resize((3, 3), Image.Resampling.BILINEAR))
         for f in files]
    ).transpose(0, 3, 1, 2).astype(np.float64)
    mean = ref.mean(axis=(0, 2, 3), keepdims=True)
    std = ref.std(axis=(0, 2, 3), keepdims=True)
    np.testing.assert_allclose(d.x_train.numpy(), (ref - mean) / std, atol=1e-5)
    np.testing.assert_array_equal(d.y_train.numpy(), [expected[f] for f in files])


def test_image_folder_errors(tmp_path):
    with pytest.raises(DataError, match="data.root: folder .*missing' does not exist"):
        load_image_folder(str(tmp_path / "missing"))
    with pytest.raises(DataError, match="at least 2; found 0"):
        load_image_folder(str(tmp_path))
    _write_tree(tmp_path / "one", classes=("only",))
    with pytest.raises(DataError, match="at least 2; found 1: only"):
        load_image_folder(str(tmp_path / "one"))

    _write_tree(tmp_path / "mixed", sizes=((6, 5), (6, 5), (7, 5)))
    with pytest.raises(DataError, match=r"0.png' is 6x5 .*2.png' is 7x5"):
        load_image_folder(str(tmp_path / "mixed"), image_size=None)
    assert load_image_folder(str(tmp_path / "mixed"), image_size=4, test_fraction=0.34)

    _write_tree(tmp_path / "broken")
    (tmp_path / "broken" / "a_bright" / "9.png").write_bytes(b"\x89PNG not really")
    with pytest.raises(DataError, match="cannot read image '.*9.png'"):
        load_image_folder(str(tmp_path / "broken"))
    with pytest.raises(ConfigError, match="data.image_size"):
        load_image_folder(str(tmp_path / "mixed"), image_size=0)


# ---------------------------------------------------------------- torchvision (local files)


def _write_idx(path, array: np.ndarray) -> None:
    """idx-ubyte format as torchvision's MNIST reader parses it (torchvision/datasets/mnist.py):
    big-endian magic 0x0800 + number of axes, then each axis length, then the raw bytes."""
    with open(path, "wb") as f:
        f.write(struct.pack(">I", 0x0800 + array.ndim))
        f.write(struct.pack(f">{array.ndim}I", *array.shape))
        f.write(array.astype(np.uint8).tobytes())


def _fake_mnist(root, n_train=20, n_test=10) -> dict[str, np.ndarray]:
    raw = root / "MNIST" / "raw"
    os.makedirs(raw)
    rng = np.random.default_rng(0)
    parts = {
        "train": (rng.integers(0, 256, (n_train, 28, 28)), np.arange(n_train) % 10),
        "t10k": (rng.integers(0, 256, (n_test, 28, 28)), np.arange(n_test) % 10),
    }
    arrays = {}
    for prefix, (x, y) in parts.items():
        _write_idx(raw / f"{prefix}-images-idx3-ubyte", x)
        _write_idx(raw / f"{prefix}-labels-idx1-ubyte", y)
        arrays.update({f"{prefix}_x": x, f"{prefix}_y": y})
    return arrays


@pytest.mark.filterwarnings("ignore:.*no training example:UserWarning")
def test_torchvision_reads_local_mnist(tmp_path):
    ref = _fake_mnist(tmp_path)
    d = load_torchvision("MNIST", str(tmp_path))
    assert d.x_train.shape == (20, 1, 28, 28) and d.num_classes == 10
    ref_train, ref_test = unstandardize_like(ref["train_x"] / 255.0, ref["t10k_x"] / 255.0)
    np.testing.assert_allclose(d.x_train[:, 0].numpy(), ref_train, atol=1e-5)
    np.testing.assert_allclose(d.x_test[:, 0].numpy(), ref_test, atol=1e-5)
    np.testing.assert_array_equal(d.y_test.numpy(), ref["t10k_y"])
    small = load_torchvision("MNIST", str(tmp_path), n_train=8, n_test=4)
    assert (len(small.x_train), len(small.x_test)) == (8, 4)
    assert_same(small, load_torchvision("MNIST", str(tmp_path), n_train=8, n_test=4))
    # Reference: the documented draw, numpy's Generator.permutation with subsample_seed (+1).
    keep = np.sort(np.random.default_rng(0).permutation(20)[:8])
    np.testing.assert_array_equal(small.y_train.numpy(), ref["train_y"][keep])


@pytest.mark.filterwarnings("ignore:.*no training example:UserWarning")
def test_torchvision_former_cap_names_still_work(tmp_path):
    _fake_mnist(tmp_path)
    with pytest.warns(FutureWarning) as caught:
        old = load_torchvision("MNIST", str(tmp_path), max_train=8, max_test=4, subsample_seed=3)
    assert [str(w.message).split(";")[0] for w in caught if w.category is FutureWarning] == [
        "data.max_train is now called data.n_train", "data.max_test is now called data.n_test"]
    assert_same(old, load_torchvision("MNIST", str(tmp_path), n_train=8, n_test=4,
                                      subsample_seed=3))
    with pytest.raises(ConfigError, match="give only data.n_test"):
        load_torchvision("MNIST", str(tmp_path), n_test=4, max_test=4)


def test_torchvision_errors(tmp_path):
    with pytest.raises(DataError, match="data.root: folder .*nowhere' does not exist"):
        load_torchvision("MNIST", str(tmp_path / "nowhere"))
    with pytest.raises(DataError, match="MNIST/raw/.*never downloads"):
        load_torchvision("MNIST", str(tmp_path))
    with pytest.raises(DataError, match="cifar-10-batches-py/.*never downloads"):
        load_torchvision("CIFAR10", str(tmp_path))
    with pytest.raises(ConfigError, match="'data.name'.*CIFAR10.*Got 'ImageNet'"):
        load_torchvision("ImageNet", str(tmp_path))


def test_to_gray_matches_pil():
    rgb = np.random.default_rng(0).integers(0, 256, (7, 9, 3), dtype=np.uint8)
    ours = to_gray(rgb.transpose(2, 0, 1)[None])[0, 0]
    # PIL docs (Image.convert): L = R * 299/1000 + G * 587/1000 + B * 114/1000, stored rounded.
    pil = np.asarray(Image.fromarray(rgb).convert("L"), dtype=np.float64)
    np.testing.assert_allclose(ours, pil, atol=0.5 + 1e-6)


# ---------------------------------------------------------------- size caps (n_train, n_test)


def _documented_cap(n: int, keep: int | None, seed: int) -> np.ndarray:
    """Reference of the documented draw: the first ``keep`` of numpy's seeded permutation."""
    if keep is None or keep >= n:
        return np.arange(n)
    return np.sort(np.random.default_rng(seed).permutation(n)[:keep])


def test_digits_caps_follow_the_documented_draw():
    from sklearn.datasets import load_digits as sk_load_digits
    from sklearn.model_selection import train_test_split

    bunch = sk_load_digits()
    tr, te = train_test_split(np.arange(1797), test_size=0.25, random_state=2,
                              stratify=bunch.target)
    tr, te = np.sort(tr), np.sort(te)
    tr, te = tr[_documented_cap(len(tr), 500, 2)], te[_documented_cap(len(te), 100, 3)]
    ref_train, ref_test = unstandardize_like(bunch.images[tr], bunch.images[te])
    d = load_digits(split_seed=2, n_train=500, n_test=100)
    assert (len(d.x_train), len(d.x_test)) == (500, 100)
    np.testing.assert_allclose(d.x_train[:, 0].numpy(), ref_train, atol=1e-5)
    np.testing.assert_allclose(d.x_test[:, 0].numpy(), ref_test, atol=1e-5)
    np.testing.assert_array_equal(d.y_train.numpy(), bunch.target[tr])


def test_caps_keep_the_held_out_split_fixed(tmp_path):
    rng = np.random.default_rng(4)
    x, y = rng.standard_normal((200, 6)).astype(np.float32), np.arange(200) % 4
    np.savez(tmp_path / "d.npz", x_train=x, y_train=y)
    load = lambda **caps: load_npz(str(tmp_path / "d.npz"), standardize=False, **caps)  # noqa: E731
    whole = load()
    assert (len(whole.x_train), len(whole.x_test)) == (160, 40)
    assert_same(whole, load(n_train=None, n_test=None))
    assert_same(whole, load(n_train=1000, n_test=1000))  # caps above the sizes keep everything
    for n_train in (10, 50, 159):  # the train cap never touches the held-out examples
        d = load(n_train=n_train)
        assert len(d.x_train) == n_train
        assert torch.equal(d.x_test, whole.x_test) and torch.equal(d.y_test, whole.y_test)
        rows = {r.tobytes() for r in whole.x_train.numpy()}
        assert all(r.tobytes() in rows for r in d.x_train.numpy())  # a subset of training
    small, large = load(n_test=10), load(n_test=25)
    assert torch.equal(small.x_train, whole.x_train)
    big = {r.tobytes() for r in large.x_test.numpy()}
    assert all(r.tobytes() in big for r in small.x_test.numpy())  # nested: smaller cap, subset


def test_npz_caps_apply_to_given_test_arrays(tmp_path):
    rng = np.random.default_rng(5)
    arrays = {"x_train": rng.standard_normal((30, 5)), "y_train": np.arange(30) % 3,
              "x_test": rng.standard_normal((12, 5)), "y_test": np.arange(12) % 3}
    np.savez(tmp_path / "d.npz", **arrays)
    d = load_npz(str(tmp_path / "d.npz"), standardize=False, n_train=20, n_test=5, split_seed=1)
    keep_train, keep_test = _documented_cap(30, 20, 1), _documented_cap(12, 5, 2)
    np.testing.assert_array_equal(d.x_train[:, 0].numpy(),
                                  arrays["x_train"][keep_train].astype(np.float32))
    np.testing.assert_array_equal(d.y_test.numpy(), arrays["y_test"][keep_test])
    assert d.num_classes == 3


def test_npz_num_classes_counts_labels_before_the_caps(tmp_path):
    rng = np.random.default_rng(6)
    np.savez(tmp_path / "d.npz", x_train=rng.standard_normal((20, 5)), y_train=np.arange(20) % 3,
             x_test=rng.standard_normal((6, 5)), y_test=np.array([0, 3, 2, 0, 1, 2]))
    keep = _documented_cap(6, 2, 1)
    assert 1 not in keep  # the draw leaves out the only example of class 3
    with pytest.warns(UserWarning, match="class 3"):
        d = load_npz(str(tmp_path / "d.npz"), n_test=2)
    assert d.num_classes == 4 and 3 not in d.y_test.tolist()


def test_image_folder_caps_read_only_the_kept_images(tmp_path, monkeypatch):
    _write_tree(tmp_path / "img", sizes=((6, 5),) * 10)
    whole = load_image_folder(str(tmp_path / "img"), image_size=4, test_fraction=0.3)
    opened = []
    real_open = Image.open
    monkeypatch.setattr(Image, "open", lambda path, *a: opened.append(path) or real_open(path, *a))
    d = load_image_folder(str(tmp_path / "img"), image_size=4, test_fraction=0.3, n_train=8,
                          n_test=4)
    assert (len(d.x_train), len(d.x_test), len(opened)) == (8, 4, 12)
    # The kept test images are the documented draw from the uncapped held-out split.
    np.testing.assert_array_equal(d.y_test.numpy(), whole.y_test.numpy()[_documented_cap(6, 4, 1)])

    _write_tree(tmp_path / "held", sizes=((6, 5),) * 3)
    t = load_image_folder(str(tmp_path / "img"), image_size=4, test_root=str(tmp_path / "held"),
                          n_train=7, n_test=2)
    assert (len(t.x_train), len(t.x_test)) == (7, 2)
    np.testing.assert_array_equal(t.y_test.numpy(), (np.arange(6) // 3)[_documented_cap(6, 2, 1)])


@pytest.mark.parametrize("field, value", [("n_train", 1), ("n_test", 0), ("n_train", 2.5)])
def test_caps_are_checked(tmp_path, field, value):
    with pytest.raises(ConfigError, match=f"'data.{field}' parameter must be .* Got"):
        load_digits(**{field: value})


# ---------------------------------------------------------------- classes with no training example


def _tensor_data(y_train, y_test, num_classes, name="mydata"):
    return TensorData(torch.zeros(len(y_train), 1, 4), torch.tensor(y_train),
                      torch.zeros(len(y_test), 1, 4), torch.tensor(y_test), num_classes, name)


@pytest.mark.parametrize(
    "y_train, y_test, num_classes, needles",
    [
        ([1, 2, 3, 4, 5, 6], [1, 6], 7, ["mydata", "1 of 7", "class 0)", "subtract 1"]),
        ([2, 3, 4], [2, 4], 5, ["2 of 5", "class 0, 1)", "subtract 2"]),
        ([0, 1, 2], [0, 1], 5, ["2 of 5", "class 3, 4)", "num_classes to 3"]),
        ([0, 2, 3], [0, 1, 3], 4, ["class 1)", "only in the held-out split"]),
        ([0, 1, 4], [0, 4], 5, ["class 2, 3)", "renumber", "data.n_train"]),
        (list(range(0, 30, 2)), [0], 30, ["15 of 30", "class 1, 3, 5", "and 5 more"]),
    ],
)
def test_absent_class_warns_in_one_line(y_train, y_test, num_classes, needles):
    with pytest.warns(UserWarning) as caught:
        _tensor_data(y_train, y_test, num_classes)
    assert len(caught) == 1
    message = str(caught[0].message)
    assert "\n" not in message and message.startswith("mydata: ")
    for needle in needles:
        assert needle in message


def test_every_class_present_does_not_warn():
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        _tensor_data([0, 1, 2, 2], [0], 3)


def test_npz_labels_one_to_six_warn(tmp_path):
    x, y = np.random.default_rng(0).standard_normal((60, 5)), np.arange(60) % 6 + 1
    np.savez(tmp_path / "scores.npz", x_train=x, y_train=y)
    with pytest.warns(UserWarning, match=r"^scores: 1 of 7 classes .*labels run 1\.\.6"):
        d = load_npz(str(tmp_path / "scores.npz"))
    assert d.num_classes == 7  # still runs as asked; the warning says what was likely meant


# ---------------------------------------------------------------- shared behaviour and configs

CHEAP = [
    lambda: load_digits(),
    lambda: load_waves(n_train=100, n_test=50),
    lambda: load_patterns(n_train=100, n_test=50),
]


@pytest.mark.parametrize("make", CHEAP)
def test_loaders_leave_global_rng_alone(make):
    np.random.seed(5)
    state = np.random.get_state()
    torch_state = torch.get_rng_state()
    make()
    assert all(np.array_equal(a, b) for a, b in zip(state, np.random.get_state(), strict=True))
    assert torch.equal(torch.get_rng_state(), torch_state)


@pytest.mark.parametrize(
    "call, field",
    [
        (lambda: load_digits(test_fraction=1.0), "data.test_fraction"),
        (lambda: load_digits(upsample=0), "data.upsample"),
        (lambda: load_digits(upsample_mode="cubic"), "data.upsample_mode"),
        (lambda: load_waves(n_classes=1), "data.n_classes"),
        (lambda: load_patterns(n_classes=9), "data.n_classes"),
        (lambda: load_waves(noise=-1.0), "data.noise"),
        (lambda: load_mnist1d(n_train=True), "data.n_train"),
    ],
)
def test_bad_parameters_name_the_field(call, field):
    with pytest.raises(ConfigError, match=f"'{field}' parameter must be .* Got"):
        call()


CONFIGS = sorted(glob.glob(os.path.join(CONFIG_DIR, "*.yaml")))


def _fill_required(name: str, tmp_path) -> dict:
    if name == "npz":
        return {"path": _npz_case(tmp_path, x_train=X, y_train=Y)}
    if name in ("image_folder", "image_folder_stream"):
        _write_tree(tmp_path / "img")
        return {"root": str(tmp_path / "img")}
    if name == "dataset":  # torchvision's FakeData: a map-style Dataset without `targets`
        return {"train": {"_target_": "torchvision.datasets.FakeData", "size": 60,
                          "image_size": [3, 8, 8], "num_classes": 3,
                          "transform": {"_target_": "torchvision.transforms.PILToTensor"}}}
    if name == "torchvision":
        _fake_mnist(tmp_path / "tv")
        return {"root": str(tmp_path / "tv"), "name": "MNIST"}
    raise AssertionError(f"no filler for required fields of {name}.yaml")


@pytest.mark.parametrize("path", CONFIGS, ids=[os.path.basename(p) for p in CONFIGS])
def test_every_data_config_instantiates(path, tmp_path):
    cfg = OmegaConf.load(path)
    name = os.path.splitext(os.path.basename(path))[0]
    required = [k for k in cfg if OmegaConf.is_missing(cfg, k)]
    if required:
        cfg = OmegaConf.merge(cfg, _fill_required(name, tmp_path))
    data = instantiate(cfg)
    assert isinstance(data, (TensorData, StreamData))
    x, y = data.train_examples(torch.arange(2))
    assert x.dtype == torch.float32 and y.dtype == data.y_train.dtype == torch.int64


@pytest.mark.parametrize("path", CONFIGS, ids=[os.path.basename(p) for p in CONFIGS])
def test_every_data_config_takes_the_tiny_preset_sizes(path, tmp_path):
    tiny = OmegaConf.load(os.path.join(CONFIG_DIR, os.pardir, "experiment", "tiny.yaml"))
    sizes = {"n_train": 40, "n_test": 12}
    assert set(tiny.data) == set(sizes)  # the keys a size preset sets on any data
    cfg = OmegaConf.load(path)
    assert {"n_train", "n_test"} <= set(cfg)  # listed in every option, null where they are caps
    name = os.path.splitext(os.path.basename(path))[0]
    required = [k for k in cfg if OmegaConf.is_missing(cfg, k)]
    if required:
        cfg = OmegaConf.merge(cfg, _fill_required(name, tmp_path))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # a cap may leave a class out
        data = instantiate(OmegaConf.merge(cfg, sizes))
    assert len(data.y_train) <= 40 and len(data.y_test) <= 12


def test_builtin_configs_exist():
    names = {os.path.splitext(os.path.basename(p))[0] for p in CONFIGS}
    expected = {"digits", "mnist1d", "waves", "patterns", "npz", "image_folder", "torchvision"}
    assert expected <= names
