"""Images from a folder tree with one subfolder per class, read with PIL.

The layout most teams already keep their labelled images in: ``root/<class name>/<image>``.
Class indices follow the sorted subfolder names. Files whose suffix is not an image suffix
(and hidden files) are skipped; a file with an image suffix that PIL cannot read is an error.
"""

from __future__ import annotations

import os

import numpy as np
from PIL import Image

from periodscan.data.base import TensorData
from periodscan.data.prep import (
    cap_split,
    check_caps,
    check_fraction,
    check_int,
    existing_path,
    standardize,
    stratified_split,
)
from periodscan.errors import DataError

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".bmp", ".gif", ".tif", ".tiff", ".webp", ".ppm", ".pgm")


def load_image_folder(
    root: str,
    image_size: int | None = 32,
    grayscale: bool = False,
    test_fraction: float = 0.2,
    split_seed: int = 0,
    test_root: str | None = None,
    n_train: int | None = None,
    n_test: int | None = None,
) -> TensorData:
    """Load ``root/<class>/<image>`` as (N, C, image_size, image_size) tensors.

    Parameters
    ----------
    root : folder with one subfolder per class (at least two).
    image_size : side of the square every image is resized to (bilinear). ``None`` keeps the
        native size, and then all images must share one size.
    grayscale : read as one luminance channel ("L"); otherwise as three channels ("RGB").
        Every image is converted, so mixed modes (palette, RGBA, grey) are fine.
    test_fraction, split_seed : stratified held-out split of ``root`` when ``test_root`` is unset.
    test_root : a second folder of the same layout used as the held-out split instead.
    n_train, n_test : keep at most this many images of each split (None: all), drawn with
        ``split_seed`` after the split, so the held-out images never depend on ``n_train``.
        Only the kept images are read.

    Pixels are scaled by per-channel mean/std of the training split.
    """
    root = existing_path("data.root", root, folder=True)
    if image_size is not None:
        image_size = check_int("data.image_size", image_size, 1, 4096)
    test_fraction = check_fraction("data.test_fraction", test_fraction)
    split_seed = check_int("data.split_seed", split_seed, 0)
    n_train, n_test = check_caps(n_train, n_test)
    mode = "L" if grayscale else "RGB"

    classes = class_names(root, "data.root")
    files, y = list_images(root, classes)
    if test_root is None:
        train, test = stratified_split(y, test_fraction, split_seed, f"data.root '{root}'")
        train, test = cap_split(train, test, n_train, n_test, split_seed)
        used = np.union1d(train, test)  # read in file order, as if every image were kept
        x = _read_images([files[i] for i in used], mode, image_size, "data.root")
        x_train, x_test = x[np.searchsorted(used, train)], x[np.searchsorted(used, test)]
        y_train, y_test = y[train], y[test]
    else:
        test_root = existing_path("data.test_root", test_root, folder=True)
        test_files, y_test = held_out_images(test_root, classes)
        train, test = cap_split(
            np.arange(len(y)), np.arange(len(y_test)), n_train, n_test, split_seed
        )
        x_train = _read_images([files[i] for i in train], mode, image_size, "data.root")
        x_test = _read_images([test_files[i] for i in test], mode, image_size,
                              "data.test_root", files[train[0]], x_train.shape[1:])
        y_train, y_test = y[train], y_test[test]
    x_train, x_test = standardize(x_train, x_test)
    name = os.path.basename(os.path.normpath(root))
    return TensorData(x_train, y_train, x_test, y_test, num_classes=len(classes), name=name)


def held_out_images(test_root: str, classes: list[str]) -> tuple[list[str], np.ndarray]:
    """Image paths of ``test_root`` and their labels, numbered by the classes of ``root``."""
    unknown = sorted(set(class_names(test_root, "data.test_root")) - set(classes))
    if unknown:
        raise DataError(
            f"data.test_root: class folders {unknown} in '{test_root}' are not among the "
            f"classes of data.root: {classes}"
        )
    test_classes = [c for c in classes if os.path.isdir(os.path.join(test_root, c))]
    test_files, test_y = list_images(test_root, test_classes)
    labels = np.array([classes.index(test_classes[i]) for i in test_y], dtype=np.int64)
    return test_files, labels


def class_names(root: str, field: str) -> list[str]:
    names = sorted(
        e.name for e in os.scandir(root) if e.is_dir() and not e.name.startswith(".")
    )
    if len(names) < 2:
        raise DataError(
            f"{field}: '{root}' must hold one subfolder per class, at least 2; "
            f"found {len(names)}{': ' + names[0] if names else ''}"
        )
    return names


def list_images(root: str, classes: list[str]) -> tuple[list[str], np.ndarray]:
    """Image paths in sorted order and their class indices (positions in ``classes``)."""
    files, labels = [], []
    for label, name in enumerate(classes):
        folder = os.path.join(root, name)
        found = sorted(
            f for f in os.listdir(folder)
            if not f.startswith(".") and f.lower().endswith(IMAGE_SUFFIXES)
        )
        if not found:
            raise DataError(
                f"data.root: class folder '{folder}' holds no images "
                f"(suffixes: {' '.join(IMAGE_SUFFIXES)})"
            )
        files += [os.path.join(folder, f) for f in found]
        labels += [label] * len(found)
    return files, np.asarray(labels, dtype=np.int64)


def _read_images(
    files: list[str],
    mode: str,
    image_size: int | None,
    field: str,
    first: str | None = None,
    shape: tuple[int, ...] | None = None,
) -> np.ndarray:
    """Stack the images as float32 (N, C, H, W) in [0, 255]; sizes must agree if not resized.

    ``first``/``shape`` name a reference image and its (C, H, W) that every image must match.
    """
    arrays = []
    for path in files:
        a = read_image(path, mode, image_size, field)
        if shape is None:
            first, shape = path, a.shape
        elif a.shape != shape:
            raise DataError(
                f"data.image_size is null (keep native size) but images differ in size: "
                f"'{first}' is {hw(shape)}, '{path}' is {hw(a.shape)}; set data.image_size "
                f"to resize them all"
            )
        arrays.append(a)
    return np.stack(arrays)


def read_image(path: str, mode: str, image_size: int | None, field: str) -> np.ndarray:
    """One image as float32 (C, H, W) with integer values in [0, 255], converted and resized."""
    try:
        with Image.open(path) as im:
            im = im.convert(mode)
            if image_size is not None:
                im = im.resize((image_size, image_size), Image.Resampling.BILINEAR)
            a = np.asarray(im, dtype=np.float32)
    except (OSError, SyntaxError, ValueError, Image.DecompressionBombError) as err:
        raise DataError(f"{field}: cannot read image '{path}' ({err})") from None
    return a[None] if a.ndim == 2 else np.moveaxis(a, 2, 0)


def hw(shape: tuple[int, ...]) -> str:
    """A (C, H, W) shape as the "width x height" people read image sizes in."""
    return f"{shape[2]}x{shape[1]} (width x height)"
