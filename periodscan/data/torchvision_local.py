"""torchvision's standard image datasets, read from files the user already has.

periodscan never downloads: every dataset is opened with ``download=False`` and a missing
file is reported with the place torchvision expects it. Arrays are taken straight from the
dataset objects (no per-image PIL round trip), scaled to [0, 1], optionally turned to grey,
and standardised per channel with training-split statistics. Each dataset's own train/test
split is kept.
"""

from __future__ import annotations

import warnings

import numpy as np

from periodscan.data.base import TensorData
from periodscan.data.prep import (
    cap_split,
    check_caps,
    check_int,
    existing_path,
    standardize,
    to_gray,
)
from periodscan.errors import ConfigError, DataError, bad_value

_IDX = (
    "train-images-idx3-ubyte, train-labels-idx1-ubyte, t10k-images-idx3-ubyte, "
    "t10k-labels-idx1-ubyte (unzipped)"
)
#: Where torchvision looks for each dataset's files, relative to ``root``.
EXPECTED_FILES = {
    "MNIST": f"MNIST/raw/: {_IDX}",
    "FashionMNIST": f"FashionMNIST/raw/: {_IDX}",
    "KMNIST": f"KMNIST/raw/: {_IDX}",
    "CIFAR10": "cifar-10-batches-py/: data_batch_1 .. data_batch_5, test_batch, batches.meta",
    "CIFAR100": "cifar-100-python/: train, test, meta",
    "SVHN": "train_32x32.mat and test_32x32.mat",
}


def load_torchvision(
    name: str,
    root: str,
    n_train: int | None = None,
    n_test: int | None = None,
    grayscale: bool = False,
    subsample_seed: int = 0,
    *,
    max_train: int | None = None,
    max_test: int | None = None,
) -> TensorData:
    """Load a torchvision dataset (one of :data:`EXPECTED_FILES`) from ``root``.

    Parameters
    ----------
    name : torchvision class name, e.g. "CIFAR10".
    root : the folder passed to torchvision as ``root`` (see :data:`EXPECTED_FILES`).
    n_train, n_test : keep at most this many examples of each split (None: all), drawn once
        with ``subsample_seed`` (same subset for every training seed), in original order.
    grayscale : turn RGB into one luminance channel (ITU-R 601-2 weights, as PIL's "L").
    max_train, max_test : the former names of ``n_train`` and ``n_test``; still accepted, with
        a FutureWarning.
    """
    if name not in EXPECTED_FILES:
        raise bad_value("data.name", "one of " + ", ".join(EXPECTED_FILES), name)
    root = existing_path("data.root", root, folder=True)
    n_train = _renamed("max_train", max_train, "n_train", n_train)
    n_test = _renamed("max_test", max_test, "n_test", n_test)
    n_train, n_test = check_caps(n_train, n_test)
    subsample_seed = check_int("data.subsample_seed", subsample_seed, 0)

    x_train, y_train, num_classes = _open(name, root, train=True)
    x_test, y_test, _ = _open(name, root, train=False)
    train, test = cap_split(
        np.arange(len(x_train)), np.arange(len(x_test)), n_train, n_test, subsample_seed
    )
    x_train, y_train, x_test, y_test = x_train[train], y_train[train], x_test[test], y_test[test]
    x_train, x_test = (x.astype(np.float32) / 255.0 for x in (x_train, x_test))
    if grayscale and x_train.shape[1] == 3:
        x_train, x_test = to_gray(x_train), to_gray(x_test)
    x_train, x_test = standardize(x_train, x_test)
    return TensorData(x_train, y_train, x_test, y_test, num_classes=num_classes, name=name)


def _renamed(old: str, old_value: int | None, new: str, value: int | None) -> int | None:
    """The value of a renamed argument, given under either name (not both)."""
    if old_value is None:
        return value
    if value is not None:
        raise ConfigError(f"data.{old} and data.{new} are the same setting (data.{old} is its "
                          f"former name); give only data.{new}")
    warnings.warn(f"data.{old} is now called data.{new}; the old name will go in a later "
                  f"release", FutureWarning, stacklevel=3)
    return old_value


def _open(name: str, root: str, train: bool) -> tuple[np.ndarray, np.ndarray, int]:
    """(uint8 images (N, C, H, W), int64 labels, number of classes) of one split."""
    import torchvision.datasets as tvd

    split = {"split": "train" if train else "test"} if name == "SVHN" else {"train": train}
    try:
        ds = getattr(tvd, name)(root, download=False, **split)
    except Exception as err:  # torchvision reports missing and corrupt files in many ways
        reason = str(err).split(" You can use download=True")[0]  # we never download
        raise DataError(
            f"data.root: cannot read {name} from '{root}' ({reason}). "
            f"Expected in '{root}': {EXPECTED_FILES[name]}. periodscan never downloads: "
            f"fetch the files yourself and point data.root at their folder"
        ) from None
    x = np.asarray(ds.data)
    if name == "CIFAR10" or name == "CIFAR100":
        x = x.transpose(0, 3, 1, 2)  # stored as (N, H, W, C)
    elif x.ndim == 3:
        x = x[:, None]  # the MNIST family: (N, H, W) grey
    y = np.asarray(ds.labels if name == "SVHN" else ds.targets, dtype=np.int64)
    num_classes = 10 if name == "SVHN" else len(ds.classes)
    return np.ascontiguousarray(x), y, num_classes

