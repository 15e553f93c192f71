"""Steps every loader shares: argument checks, the fixed held-out split, standardisation.

Keeping them in one place means every dataset is split, subsampled and scaled the same way,
so a sweep's numbers do not depend on which loader produced the tensors.
"""

from __future__ import annotations

import numbers
import os

import numpy as np

from periodscan.errors import DataError, bad_value


def check_int(field: str, value: object, low: int, high: int | None = None) -> int:
    """Return ``value`` as an int, or raise ConfigError naming ``field`` and the allowed range."""
    top = "inf)" if high is None else f"{high}]"
    ok = isinstance(value, numbers.Integral) and not isinstance(value, bool)
    if not ok or value < low or (high is not None and value > high):
        raise bad_value(field, f"an int in the range [{low}, {top}", value)
    return int(value)


def check_optional_int(field: str, value: object, low: int) -> int | None:
    """Like :func:`check_int` but ``None`` passes through (meaning "no limit")."""
    return None if value is None else check_int(field, value, low)


def check_fraction(field: str, value: object) -> float:
    """Return ``value`` as a float strictly between 0 and 1, or raise ConfigError."""
    ok = isinstance(value, numbers.Real) and not isinstance(value, bool)
    if not ok or not 0.0 < float(value) < 1.0:
        raise bad_value(field, "a float in the open interval (0, 1)", value)
    return float(value)


def check_choice(field: str, value: object, allowed: tuple[str, ...]) -> str:
    """Return ``value`` if it is one of ``allowed``, else raise ConfigError listing them."""
    if value not in allowed:
        raise bad_value(field, "one of " + ", ".join(repr(a) for a in allowed), value)
    return str(value)


def existing_path(field: str, path: object, *, folder: bool) -> str:
    """Expand ``~`` and return the path as ``str``; raise DataError if it is not there."""
    if not isinstance(path, (str, os.PathLike)) or str(path) == "":
        raise bad_value(field, "a path (string)", path)
    full = os.path.expanduser(os.fspath(path))
    kind = "folder" if folder else "file"
    if not (os.path.isdir(full) if folder else os.path.isfile(full)):
        raise DataError(f"{field}: {kind} '{full}' does not exist")
    return full


def stratified_split(
    y: np.ndarray, test_fraction: float, split_seed: int, where: str
) -> tuple[np.ndarray, np.ndarray]:
    """Sorted train and test indices of a stratified split fixed by ``split_seed``.

    Uses scikit-learn's ``train_test_split(stratify=y)``, so each class keeps its share in both
    parts. The split depends on the data and ``split_seed`` only, never on a training seed, so
    every run of a sweep is scored on the same held-out examples.
    """
    from sklearn.model_selection import train_test_split

    idx = np.arange(len(y))
    try:
        train, test = train_test_split(
            idx, test_size=test_fraction, random_state=split_seed, stratify=y
        )
    except ValueError as err:
        counts = np.bincount(np.unique(y, return_inverse=True)[1])
        raise DataError(
            f"{where}: cannot make a stratified split with test_fraction={test_fraction} of "
            f"{len(y)} examples in {len(counts)} classes (smallest class: {counts.min()} "
            f"examples); need at least 2 per class and one test example per class ({err})"
        ) from None
    return np.sort(train), np.sort(test)


def subsample(n: int, keep: int | None, seed: int) -> np.ndarray:
    """Indices of ``keep`` of ``n`` examples drawn without replacement, in original order.

    ``keep=None`` or ``keep >= n`` keeps everything. The draw uses its own
    ``numpy.random.default_rng(seed)``, so global random state is never touched.
    """
    if keep is None or keep >= n:
        return np.arange(n)
    return np.sort(np.random.default_rng(seed).permutation(n)[:keep])


def cap_split(
    train: np.ndarray, test: np.ndarray, n_train: int | None, n_test: int | None, seed: int
) -> tuple[np.ndarray, np.ndarray]:
    """Keep at most ``n_train`` of the ``train`` indices and ``n_test`` of the ``test`` ones.

    Each part is cut on its own (:func:`subsample` with ``seed`` for train, ``seed + 1`` for
    test), so the held-out examples never depend on ``n_train`` and a smaller ``n_test`` keeps a
    subset of the larger one's draw order. ``None`` keeps a part whole, so without caps the
    indices come back unchanged.
    """
    return train[subsample(len(train), n_train, seed)], test[subsample(len(test), n_test, seed + 1)]


def check_caps(n_train: object, n_test: object) -> tuple[int | None, int | None]:
    """Check the ``data.n_train`` / ``data.n_test`` caps: null, or at least 2 and 1 examples."""
    return check_optional_int("data.n_train", n_train, 2), check_optional_int(
        "data.n_test", n_test, 1
    )


def standardize(x_train: np.ndarray, x_test: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-channel mean/std from the training split only, applied to both splits.

    Arrays are (N, C, ...). Statistics are accumulated in float64 one channel at a time (so a
    large image set is never copied whole in double precision); a constant channel gets std 1
    so it maps to zeros instead of NaN. Returns float32 arrays.
    """
    shape = (1, x_train.shape[1]) + (1,) * (x_train.ndim - 2)
    mean, std = np.empty(shape, np.float32), np.empty(shape, np.float32)
    for c in range(x_train.shape[1]):
        channel = x_train[:, c].astype(np.float64)
        mean.flat[c], std.flat[c] = channel.mean(), channel.std() or 1.0
    return (
        (x_train.astype(np.float32) - mean) / std,
        (x_test.astype(np.float32) - mean) / std,
    )


def to_gray(x: np.ndarray) -> np.ndarray:
    """(N, 3, ...) RGB to (N, 1, ...) luminance with the ITU-R 601-2 weights PIL uses for "L"."""
    weights = np.array([0.299, 0.587, 0.114]).reshape(1, 3, *([1] * (x.ndim - 2)))
    return (x.astype(np.float64) * weights).sum(axis=1, keepdims=True)
