"""mnist1d: procedural 40-point signals of the ten digits, generated offline. The demo default.

The mnist1d package turns ten hand-made 1-D digit templates into examples by random padding,
shear, scaling, translation and correlated plus white noise. We only ever call its generator
(``make_dataset``), never ``get_dataset``, which would download. Generation takes a few seconds,
so results are cached in-process and, optionally, on disk as .npz (``$PERIODSCAN_CACHE`` or
``~/.cache/periodscan``), keyed by the arguments and the mnist1d version.
"""

from __future__ import annotations

import contextlib
import functools
import hashlib
import json
import os
import random
import tempfile
from importlib.metadata import version

import numpy as np
import torch

from periodscan.data.base import TensorData
from periodscan.data.prep import check_int, standardize

_CACHE_FORMAT = 1  # bump when the cached arrays change meaning


def load_mnist1d(
    n_train: int = 4000, n_test: int = 1000, seed: int = 42, disk_cache: bool = True
) -> TensorData:
    """Load mnist1d signals as (N, 1, 40) inputs, 10 classes.

    Parameters
    ----------
    n_train, n_test : examples in each split. mnist1d makes equally many per class, so it is
        asked for ``n_train + n_test`` rounded up to a multiple of 10 and the surplus is dropped.
    seed : mnist1d's generator seed (42 is its own default). The first ``n_train`` examples of
        its shuffled output are the training split, the next ``n_test`` the held-out split.
    disk_cache : also keep the generated arrays in an .npz cache file.

    Signals are standardised with the training split's mean and std (a single channel).
    The global ``random`` and ``numpy.random`` states are left as they were.
    """
    n_train = check_int("data.n_train", n_train, 10)
    n_test = check_int("data.n_test", n_test, 10)
    seed = check_int("data.seed", seed, 0, 2**32 - 1)
    data = _load_cached(n_train, n_test, seed, bool(disk_cache))
    return TensorData(
        data.x_train.clone(), data.y_train.clone(), data.x_test.clone(), data.y_test.clone(),
        num_classes=data.num_classes, name=data.name,
    )


def generator_args(n_train: int, n_test: int, seed: int) -> object:
    """The mnist1d argument object we generate with: its defaults, our sizes and seed."""
    from mnist1d.data import get_dataset_args

    args = get_dataset_args()
    total = n_train + n_test
    args.num_samples = -(-total // 10) * 10
    args.train_split = n_train / args.num_samples
    args.seed = seed
    return args


@functools.lru_cache(maxsize=8)
def _load_cached(n_train: int, n_test: int, seed: int, disk_cache: bool) -> TensorData:
    args = generator_args(n_train, n_test, seed)
    path = _cache_path(args) if disk_cache else None
    arrays = _read_npz(path) if path else None
    if arrays is None:
        arrays = _generate(args)
        if path:
            _write_npz(path, arrays)
    x, y = arrays
    x_train, x_test = standardize(x[:n_train, None], x[n_train : n_train + n_test, None])
    return TensorData(
        torch.from_numpy(x_train), torch.from_numpy(y[:n_train]),
        torch.from_numpy(x_test), torch.from_numpy(y[n_train : n_train + n_test]),
        num_classes=10, name="mnist1d",
    )


def _generate(args: object) -> tuple[np.ndarray, np.ndarray]:
    """All generated examples in mnist1d's order, train part first: (x (N, 40), y (N,))."""
    from mnist1d.data import make_dataset

    np_state, py_state = np.random.get_state(), random.getstate()
    try:  # make_dataset seeds and draws from the global generators
        ds = make_dataset(args)
    finally:
        np.random.set_state(np_state)
        random.setstate(py_state)
    x = np.concatenate([ds["x"], ds["x_test"]]).astype(np.float32)
    y = np.concatenate([ds["y"], ds["y_test"]]).astype(np.int64)
    return x, y


def _cache_path(args: object) -> str:
    keys = {k: v for k, v in vars(args).items() if k != "url"}
    keys.update(mnist1d=version("mnist1d"), format=_CACHE_FORMAT)
    digest = hashlib.sha256(json.dumps(keys, sort_keys=True).encode()).hexdigest()[:16]
    root = os.environ.get("PERIODSCAN_CACHE") or os.path.join("~", ".cache", "periodscan")
    return os.path.join(os.path.expanduser(root), f"mnist1d-{digest}.npz")


def _read_npz(path: str) -> tuple[np.ndarray, np.ndarray] | None:
    """Cached arrays, or None if the file is absent or unreadable (then we regenerate)."""
    try:
        with np.load(path, allow_pickle=False) as f:
            x, y = f["x"], f["y"]
    except (OSError, KeyError, ValueError, EOFError):
        return None
    if x.dtype != np.float32 or y.dtype != np.int64 or x.ndim != 2 or len(x) != len(y):
        return None
    return x, y


def _write_npz(path: str, arrays: tuple[np.ndarray, np.ndarray]) -> None:
    """Write atomically (temporary file, then rename); a cache that cannot be written is skipped."""
    folder = os.path.dirname(path)
    try:
        os.makedirs(folder, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=folder, prefix=".mnist1d-", suffix=".tmp")
    except OSError:
        return
    try:
        with os.fdopen(fd, "wb") as f:
            np.savez(f, x=arrays[0], y=arrays[1])
        os.chmod(tmp, 0o644)  # mkstemp makes it private; a cache is ordinary data
        os.replace(tmp, path)
    except OSError:
        with contextlib.suppress(OSError):
            os.remove(tmp)
