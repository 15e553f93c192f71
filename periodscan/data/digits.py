"""scikit-learn's bundled 8x8 handwritten digits: a real dataset that needs no download.

1,797 grey-level images of the digits 0-9 ship inside scikit-learn, so this loader works on
any machine that can install the package. Small enough for a whole sweep on a laptop.
"""

from __future__ import annotations

import numpy as np
import torch
import torch.nn.functional as F

from periodscan.data.base import TensorData
from periodscan.data.prep import (
    cap_split,
    check_caps,
    check_choice,
    check_fraction,
    check_int,
    standardize,
    stratified_split,
)


def load_digits(
    test_fraction: float = 0.25,
    split_seed: int = 0,
    upsample: int = 1,
    upsample_mode: str = "nearest",
    n_train: int | None = None,
    n_test: int | None = None,
) -> TensorData:
    """Load the digits as (N, 1, 8 * upsample, 8 * upsample) images, 10 classes.

    Parameters
    ----------
    test_fraction : share of each class held out (stratified split fixed by ``split_seed``).
    split_seed : seed of the train/test split; independent of any training seed.
    upsample : integer zoom factor, e.g. 2 for 16x16 inputs (gives a blur deficit room to act).
    upsample_mode : "nearest" (pixel copies) or "bilinear" (half-pixel centres, edge clamped).
    n_train, n_test : keep at most this many examples of each split (None: all), drawn with
        ``split_seed`` after the split, so the held-out examples never depend on ``n_train``.

    Pixels (0-16) are standardised with the mean/std of the training split only.
    """
    from sklearn.datasets import load_digits as sk_load_digits

    test_fraction = check_fraction("data.test_fraction", test_fraction)
    split_seed = check_int("data.split_seed", split_seed, 0)
    upsample = check_int("data.upsample", upsample, 1, 16)
    upsample_mode = check_choice("data.upsample_mode", upsample_mode, ("nearest", "bilinear"))
    n_train, n_test = check_caps(n_train, n_test)

    bunch = sk_load_digits()
    x = bunch.images.astype(np.float32)[:, None]  # (N, 1, 8, 8)
    y = bunch.target.astype(np.int64)
    if upsample > 1:
        kwargs = {"align_corners": False} if upsample_mode == "bilinear" else {}
        x = F.interpolate(
            torch.from_numpy(x), scale_factor=upsample, mode=upsample_mode, **kwargs
        ).numpy()
    train, test = stratified_split(y, test_fraction, split_seed, "data (digits)")
    train, test = cap_split(train, test, n_train, n_test, split_seed)
    x_train, x_test = standardize(x[train], x[test])
    name = "digits" if upsample == 1 else f"digits{8 * upsample}"
    return TensorData(x_train, y[train], x_test, y[test], num_classes=10, name=name)
