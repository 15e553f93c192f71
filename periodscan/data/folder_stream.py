"""An image folder read from disk batch by batch (``data=image_folder_stream``).

The same folder layout, split, caps and scaling as :func:`periodscan.data.load_image_folder`,
but only the file list and labels are held in memory: each image is read, converted, resized
and standardised when a batch needs it, in a DataLoader worker. The per-channel mean and std
come from one pass over the training images, summed as exact integers, so they equal the
in-memory loader's float64 statistics and both loaders give the same tensors
(tests/test_stream.py compares them).
"""

from __future__ import annotations

import math
import os
from fractions import Fraction
from typing import Any

import numpy as np
import torch
from torch.utils.data import Dataset

from periodscan.data.folder import class_names, held_out_images, hw, list_images, read_image
from periodscan.data.prep import (
    cap_split,
    check_caps,
    check_fraction,
    check_int,
    existing_path,
    stratified_split,
)
from periodscan.data.stream import StreamData, one_pass
from periodscan.errors import DataError, bad_value


class ImageFiles(Dataset):
    """Images read from their files on every access; ``(C, H, W)`` float32 and the label.

    ``files`` is one numpy array of encoded paths: a byte per character, no Python object
    per path, for folders of hundreds of thousands of files.
    With ``mean``/``std`` (shape (C,)) pixels are standardised as the in-memory loader does:
    ``(x - mean) / std`` in float32.
    """

    def __init__(self, files: list[str] | np.ndarray, labels: np.ndarray, mode: str,
                 image_size: int | None, field: str, mean: np.ndarray | None = None,
                 std: np.ndarray | None = None) -> None:
        self.files = (files if isinstance(files, np.ndarray)
                      else np.array([os.fsencode(f) for f in files]))
        self.targets = np.asarray(labels, dtype=np.int64)
        self.mode, self.image_size, self.field = mode, image_size, field
        self.mean = None if mean is None else np.asarray(mean, np.float32).reshape(-1, 1, 1)
        self.std = None if std is None else np.asarray(std, np.float32).reshape(-1, 1, 1)

    def __len__(self) -> int:
        return len(self.files)

    def __getitem__(self, i: int) -> tuple[torch.Tensor, int]:
        a = read_image(os.fsdecode(self.files[i]), self.mode, self.image_size, self.field)
        a = np.ascontiguousarray(a)  # (C, H, W) in memory: the in-place ops below run 2x faster
        if self.mean is not None:
            a -= self.mean  # the same float32 operations as (x - mean) / std, without temporaries
            a /= self.std
        return torch.from_numpy(a), int(self.targets[i])


class ChannelSums(Dataset):
    """Per image, as int64: its (C, H, W), per-channel pixel sums, per-channel sums of squares."""

    def __init__(self, images: ImageFiles) -> None:
        self.images = images

    def __len__(self) -> int:
        return len(self.images)

    def __getitem__(self, i: int) -> torch.Tensor:
        a = read_image(os.fsdecode(self.images.files[i]), self.images.mode,
                       self.images.image_size,
                       self.images.field).astype(np.int64)
        flat = a.reshape(a.shape[0], -1)
        return torch.from_numpy(np.concatenate([np.array(a.shape, np.int64), flat.sum(1),
                                                (flat * flat).sum(1)]))


def channel_stats(images: ImageFiles, num_workers: int) -> tuple[np.ndarray, np.ndarray]:
    """Per-channel mean and std (float32) of the images, equal to the in-memory loader's.

    Pixels are integers, so the sums are exact in int64 and the mean is the correctly rounded
    sum / count, as numpy's float64 mean is. The variance is exact as a fraction; its square
    root is rounded twice (float64, then float32), numpy's once from a float64 sum of squared
    deviations, so in rare ties the float32 std could differ by one unit in the last place.
    A constant channel gets std 1, as in :func:`periodscan.data.prep.standardize`.
    """
    seen, first, sums = 0, None, None
    for batch in one_pass(ChannelSums(images), num_workers):  # (B, 3 + 2C) int64
        shapes = batch[:, :3]
        first = tuple(shapes[0].tolist()) if first is None else first
        odd = (shapes != torch.tensor(first)).any(1).nonzero()
        if len(odd):
            raise DataError(f"data.image_size is null (keep native size) but images differ in "
                            f"size: '{os.fsdecode(images.files[0])}' is {hw(first)}, "
                            f"'{os.fsdecode(images.files[seen + int(odd[0])])}' is "
                            f"{hw(tuple(shapes[int(odd[0])].tolist()))}; set data.image_size to "
                            f"resize them all")
        part = batch[:, 3:].sum(0)  # (2C,): sums then sums of squares over these images
        sums = part if sums is None else sums + part
        seen += len(batch)
    channels, total = first[0], len(images) * first[1] * first[2]
    mean = [Fraction(int(s), total) for s in sums[:channels]]
    var = [Fraction(int(q), total) - m * m for q, m in zip(sums[channels:], mean, strict=True)]
    std = [math.sqrt(float(v)) or 1.0 for v in var]
    return np.array([float(m) for m in mean], np.float32), np.array(std, np.float32)


def stream_image_folder(root: str, image_size: int | None = 32, grayscale: bool = False,
                        test_fraction: float = 0.2, split_seed: int = 0,
                        test_root: str | None = None, n_train: int | None = None,
                        n_test: int | None = None, num_workers: int = 2,
                        mean: list[float] | None = None,
                        std: list[float] | None = None) -> StreamData:
    """Stream ``root/<class>/<image>`` from disk as (C, image_size, image_size) examples.

    Parameters are those of :func:`periodscan.data.load_image_folder`, plus:

    num_workers : DataLoader worker processes reading images (0: read in the training
        process). Speed only, never the numbers.
    mean, std : per-channel statistics to standardise with; None measures them in one pass
        over the training images (what the in-memory loader computes).
    """
    root = existing_path("data.root", root, folder=True)
    if image_size is not None:
        image_size = check_int("data.image_size", image_size, 1, 4096)
    num_workers = check_int("data.num_workers", num_workers, 0, 64)
    mode = "L" if grayscale else "RGB"
    (train, y_train), (test, y_test) = folder_split(
        root, test_root, check_fraction("data.test_fraction", test_fraction),
        check_int("data.split_seed", split_seed, 0), *check_caps(n_train, n_test))
    raw = ImageFiles(train, y_train, mode, image_size, "data.root")
    if (mean is None) != (std is None):
        raise bad_value("data.mean", "set together with data.std (or both null)", mean)
    if mean is None:
        mean, std = channel_stats(raw, num_workers)
    else:
        mean, std = _given_stats(mean, std, 1 if grayscale else 3)
    field = "data.root" if test_root is None else "data.test_root"
    train_set = ImageFiles(raw.files, y_train, mode, image_size, "data.root", mean, std)
    test_set = ImageFiles(test, y_test, mode, image_size, field, mean, std)
    num_classes = len(class_names(root, "data.root"))
    return StreamData(train_set, test_set, y_train, y_test, num_classes, num_workers,
                      name=os.path.basename(os.path.normpath(root)))


def folder_split(root: str, test_root: str | None, test_fraction: float, split_seed: int,
                 n_train: int | None, n_test: int | None) -> tuple[Any, Any]:
    """((train files, labels), (test files, labels)) chosen as load_image_folder chooses them."""
    classes = class_names(root, "data.root")
    files, y = list_images(root, classes)
    if test_root is None:
        train, test = stratified_split(y, test_fraction, split_seed, f"data.root '{root}'")
        train, test = cap_split(train, test, n_train, n_test, split_seed)
        test_files, y_test = files, y
    else:
        test_root = existing_path("data.test_root", test_root, folder=True)
        test_files, y_test = held_out_images(test_root, classes)
        train, test = cap_split(np.arange(len(y)), np.arange(len(y_test)), n_train, n_test,
                                split_seed)
    return (([files[i] for i in train], y[train]),
            ([test_files[i] for i in test], y_test[test]))


def _given_stats(mean: Any, std: Any, channels: int) -> tuple[np.ndarray, np.ndarray]:
    for field, value in (("data.mean", mean), ("data.std", std)):
        ok = (isinstance(value, (list, tuple)) and len(value) == channels
              and all(isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
                      for v in value))
        if not ok or (field == "data.std" and min(value) <= 0):
            allowed = f"a list of {channels} finite numbers" + (" > 0" if field == "data.std"
                                                                  else "")
            raise bad_value(field, allowed, value)
    return np.asarray(mean, np.float32), np.asarray(std, np.float32)
