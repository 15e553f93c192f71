"""A user's own arrays from one ``.npz`` file (as written by ``numpy.savez``).

The quickest way to bring private data: save inputs and integer labels with numpy and point
``data.path`` at the file. Inputs may come in any common layout; they are brought to
(N, C, L) or (N, C, H, W) by the rule in :func:`to_channels_first`.
"""

from __future__ import annotations

import os
import zipfile

import numpy as np

from periodscan.data import prep
from periodscan.data.base import TensorData
from periodscan.data.prep import (
    cap_split,
    check_caps,
    check_choice,
    check_fraction,
    check_int,
    existing_path,
    stratified_split,
)
from periodscan.errors import DataError, bad_value

LAYOUTS = ("auto", "NL", "NCL", "NHW", "NCHW", "NHWC")


def load_npz(
    path: str,
    x_train: str = "x_train",
    y_train: str = "y_train",
    x_test: str | None = "x_test",
    y_test: str | None = "y_test",
    test_fraction: float = 0.2,
    split_seed: int = 0,
    num_classes: int | None = None,
    standardize: bool = True,
    layout: str = "auto",
    n_train: int | None = None,
    n_test: int | None = None,
) -> TensorData:
    """Load inputs and labels from the named arrays of an .npz file.

    Parameters
    ----------
    path : the .npz file.
    x_train, y_train : names of the training inputs and labels.
    x_test, y_test : names of the held-out arrays. If the file has neither (or both are null),
        the training arrays are split, stratified, by ``test_fraction`` and ``split_seed``.
    num_classes : defaults to the largest label + 1 (over all examples, before any cap).
    standardize : scale inputs by per-channel training mean/std (else keep values as float32).
    layout : input layout, or "auto" (see :func:`to_channels_first`).
    n_train, n_test : keep at most this many examples of each split (None: all), drawn with
        ``split_seed`` after the split, so the held-out examples never depend on ``n_train``.
    """
    path = existing_path("data.path", path, folder=False)
    test_fraction = check_fraction("data.test_fraction", test_fraction)
    split_seed = check_int("data.split_seed", split_seed, 0)
    layout = check_choice("data.layout", layout, LAYOUTS)
    if num_classes is not None:
        num_classes = check_int("data.num_classes", num_classes, 2)
    n_train, n_test = check_caps(n_train, n_test)

    names = (x_train, y_train, x_test, y_test)
    xa, ya, xb, yb = _splits(path, names, layout, test_fraction, split_seed)
    top = int(np.concatenate([ya, yb]).max())  # ya is never empty; yb may be
    if num_classes is None:
        num_classes = top + 1
    elif top >= num_classes:
        raise bad_value("data.num_classes", f"greater than the largest label ({top})", num_classes)
    train, test = cap_split(np.arange(len(ya)), np.arange(len(yb)), n_train, n_test, split_seed)
    xa, ya, xb, yb = xa[train], ya[train], xb[test], yb[test]
    if len(np.unique(ya)) < 2:
        raise DataError(f"{path}: '{y_train}' holds a single class ({ya[0]}); need at least 2")
    if standardize:
        xa, xb = prep.standardize(xa, xb)
    name = os.path.splitext(os.path.basename(path))[0]
    return TensorData(xa, ya, xb, yb, num_classes=num_classes, name=name)


def _splits(
    path: str, names: tuple[str, str, str | None, str | None], layout: str,
    test_fraction: float, split_seed: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Channels-first inputs and int64 labels of the train and held-out splits, uncapped.

    ``names`` are the arrays' names in the file: x_train, y_train, x_test, y_test.

    The held-out split is the file's test arrays when it has both, else a stratified split of
    the training arrays fixed by ``split_seed``.
    """
    x_train, y_train, x_test, y_test = names
    arrays = _read(path)
    xa, ya = _get(arrays, path, "x_train", x_train), _get(arrays, path, "y_train", y_train)
    has_test = [n is not None and n in arrays for n in (x_test, y_test)]
    if any(has_test) and not all(has_test):
        missing = ("x_test", x_test) if not has_test[0] else ("y_test", y_test)
        _get(arrays, path, *missing)  # raises, naming the missing array
    xa = to_channels_first(_inputs(xa, path, x_train), layout, f"{path}: {x_train}")
    ya = _labels(ya, path, y_train, len(xa), x_train)
    if len(ya) == 0:
        raise DataError(f"{path}: '{y_train}' is empty; need examples of at least 2 classes")
    if all(has_test):
        xb = to_channels_first(_inputs(arrays[x_test], path, x_test), layout, f"{path}: {x_test}")
        yb = _labels(arrays[y_test], path, y_test, len(xb), x_test)
        return xa, ya, xb, yb
    train, test = stratified_split(ya, test_fraction, split_seed, f"data.path '{path}'")
    return xa[train], ya[train], xa[test], ya[test]


def to_channels_first(x: np.ndarray, layout: str, where: str) -> np.ndarray:
    """Bring inputs to (N, C, L) or (N, C, H, W).

    The "auto" rule: 2-D is (N, L); 3-D is (N, C, L) when axis 1 has at most 4 entries (a few
    signal channels), else (N, H, W); 4-D is (N, H, W, C) when the last axis is 1 or 3 and
    axis 1 is not, else (N, C, H, W). Pass an explicit ``layout`` when the rule guesses wrong.
    """
    if layout == "auto" and x.ndim == 2:
        layout = "NL"
    elif layout == "auto" and x.ndim == 3:
        layout = "NCL" if x.shape[1] <= 4 else "NHW"
    elif layout == "auto":
        layout = "NHWC" if x.shape[3] in (1, 3) and x.shape[1] not in (1, 3) else "NCHW"
    if x.ndim != len(layout):
        raise DataError(
            f"{where}: layout {layout} needs a {len(layout)}-D array; got shape {x.shape}"
        )
    if layout in ("NL", "NHW"):
        return x[:, None]
    return np.moveaxis(x, 3, 1) if layout == "NHWC" else x


def _read(path: str) -> dict[str, np.ndarray]:
    try:
        f = np.load(path, allow_pickle=False)
        if not isinstance(f, np.lib.npyio.NpzFile):
            raise DataError(f"data.path: '{path}' holds a single array, not an .npz archive")
        with f:
            return {k: f[k] for k in f.files}
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as err:
        raise DataError(f"data.path: cannot read '{path}' as .npz ({err})") from None


def _get(arrays: dict[str, np.ndarray], path: str, field: str, key: str | None) -> np.ndarray:
    if key is None or key not in arrays:
        held = ", ".join(sorted(arrays)) or "nothing"
        raise DataError(f"data.{field}: no array '{key}' in '{path}'; the file holds: {held}")
    return arrays[key]


def _inputs(x: np.ndarray, path: str, key: str) -> np.ndarray:
    if not (np.issubdtype(x.dtype, np.number) or x.dtype == bool) or x.ndim not in (2, 3, 4):
        raise DataError(
            f"{path}: input array '{key}' must be numeric with 2 to 4 axes; "
            f"got dtype {x.dtype}, shape {x.shape}"
        )
    return x.astype(np.float32)


def _labels(y: np.ndarray, path: str, key: str, n: int, x_key: str) -> np.ndarray:
    if y.ndim != 1 or len(y) != n:
        raise DataError(
            f"{path}: labels '{key}' must have shape ({n},) to match inputs '{x_key}'; "
            f"got shape {y.shape}"
        )
    integral = np.issubdtype(y.dtype, np.integer) or (
        np.issubdtype(y.dtype, np.floating) and np.all(np.isfinite(y)) and np.all(y == np.round(y))
    )
    if not integral or (len(y) and y.min() < 0):
        raise DataError(
            f"{path}: labels '{key}' must be integers >= 0 (class indices); got dtype {y.dtype}"
            + (f", minimum {y.min()}" if integral else "")
        )
    return y.astype(np.int64)
