"""Map-style Datasets as a user would write them, for the streamed-data tests.

Importable by loader workers and by ``python -m periodscan.cli`` subprocesses (pytest puts
tests/ on ``sys.path``; the CLI tests set ``PYTHONPATH``). ``Signals`` serves the tiny
config's mnist1d tensors one example at a time, so a sweep on it can be compared with the
in-memory sweep on the same tensors. The others misbehave in one way each.
"""

from __future__ import annotations

import os

import numpy as np
import torch
from PIL import Image
from torch.utils.data import Dataset

from periodscan.data import load_mnist1d


class Signals(Dataset):
    """mnist1d signals (the tiny test config's data), example by example, without ``targets``.

    Inputs come back as numpy arrays, labels as Python ints: the forms a user's code returns.
    """

    def __init__(self, split: str, n_train: int = 600, n_test: int = 300) -> None:
        data = load_mnist1d(n_train=n_train, n_test=n_test)
        self.x = getattr(data, f"x_{split}").numpy()
        self.y = getattr(data, f"y_{split}").tolist()

    def __len__(self) -> int:
        return len(self.y)

    def __getitem__(self, i: int):
        return self.x[i], self.y[i]


class PngFiles(Dataset):
    """Grey PNG files ``root/<label>_<i>.png`` read with PIL on every access, scaled to [0, 1].

    Has ``files`` and ``targets``, so its labels are read without a pass and its fingerprint
    hashes the files.
    """

    def __init__(self, root: str) -> None:
        names = sorted(n for n in os.listdir(root) if n.endswith(".png"))
        self.files = [os.path.join(root, n) for n in names]
        self.targets = [int(n.split("_")[0]) for n in names]

    def __len__(self) -> int:
        return len(self.files)

    def __getitem__(self, i: int):
        with Image.open(self.files[i]) as im:
            x = torch.from_numpy(np.asarray(im.convert("L"), dtype=np.float32) / 255.0)
        return x[None], self.targets[i]


def write_pngs(root: str, n: int, size: int = 12, classes: int = 3, seed: int = 0) -> None:
    """``n`` grey images whose mean brightness and a bar's position depend on the class."""
    os.makedirs(root, exist_ok=True)
    rng = np.random.default_rng(seed)
    for i in range(n):
        label = i % classes
        a = rng.integers(0, 80, (size, size)) + 40 * label
        a[:, (label * size) // classes] = 255
        Image.fromarray(a.astype(np.uint8)).save(os.path.join(root, f"{label}_{i:05d}.png"))


class Broken(Dataset):
    """Small random signals that misbehave as ``fault`` says, at example ``at`` (if indexed).

    faults: "shape" (example ``at`` is longer), "flat" (every input is 1-D), "float_labels"
    (labels 0.0, 1.0), "onehot" (labels are one-hot vectors), "random" (inputs change on
    every read), "float_targets" (a ``targets`` attribute of floats).
    """

    def __init__(self, fault: str, n: int = 64, at: int = 63) -> None:
        self.fault, self.n, self.at = fault, n, at
        self.x = np.random.default_rng(0).normal(size=(n, 1, 20)).astype(np.float32)
        if fault == "float_targets":
            self.targets = [float(i % 2) for i in range(n)]

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, i: int):
        x, y = self.x[i], i % 2
        if self.fault == "shape" and i == self.at:
            x = np.zeros((1, 24), np.float32)
        if self.fault == "flat":
            x = x[0]
        if self.fault == "random":
            x = x + np.random.normal(size=x.shape).astype(np.float32)
        if self.fault == "float_labels":
            return x, float(y)
        if self.fault == "onehot":
            return x, torch.nn.functional.one_hot(torch.tensor(y), 2)
        return x, y
