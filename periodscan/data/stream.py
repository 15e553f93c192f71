"""Data read example by example from map-style torch Datasets, through a DataLoader.

For a ``torch.utils.data.Dataset`` of your own (``data=dataset``) and for image folders too
large for memory (``data=image_folder_stream``). Only the label vectors are held in memory
(read once: from ``dataset.targets`` when the Dataset has it, otherwise by one pass). The
training loop still decides everything random: it draws the epoch's order from the
(seed, epoch) generator, cuts it into batches and hands them to :meth:`StreamData.train_batches`,
which reads exactly those examples through a DataLoader whose ``batch_sampler`` yields them;
augmentation and deficits are applied afterwards, in the training process. So a Dataset must
be a pure function of the index (no random transforms in it: augmentation belongs to
``schedule.augment`` or a deficit, which draw from keyed generators); the trial in
:func:`check_examples` reads examples twice to catch one that is not.

Loader worker processes start on first use and are kept while the data stays loaded in the
training process (``persistent_workers``). They are forked, not spawned, on Linux: a local
executor's worker is itself a loky process, whose default start method cannot start them. A
process that may not have children (a Dask worker, which is a daemon) reads in the training
process instead; the numbers are the same.
"""

from __future__ import annotations

import hashlib
import multiprocessing
import os
import sys
from collections.abc import Iterator, Sequence
from typing import Any

import numpy as np
import torch
from torch.utils.data import DataLoader, Dataset, Subset

from periodscan.data.base import check_labels
from periodscan.data.filehash import file_digests
from periodscan.data.prep import (
    cap_split,
    check_caps,
    check_fraction,
    check_int,
    stratified_split,
)
from periodscan.errors import DataError

#: Examples per batch of the one-off passes that read labels or hash examples.
PASS_BATCH = 256


class StreamData:
    """Train and held-out Datasets read on demand; the interface the engine uses on any data.

    ``y_train``/``y_test`` (int64 label vectors), ``num_classes`` and ``input_shape`` are what
    deficits and models read; :meth:`train_examples`, :meth:`train_batches` and
    :meth:`test_batches` are how the loop, the Fisher probe and evaluation read inputs, the
    same methods :class:`periodscan.data.TensorData` has. There is no ``x_train``: a deficit
    that needs all inputs at once does not work on streamed data.
    """

    def __init__(self, train: Dataset, test: Dataset, y_train: torch.Tensor,
                 y_test: torch.Tensor, num_classes: int, num_workers: int = 2,
                 name: str = "data") -> None:
        self.train, self.test, self.name = train, test, name
        self.y_train = torch.as_tensor(y_train, dtype=torch.int64)
        self.y_test = torch.as_tensor(y_test, dtype=torch.int64)
        self.num_classes = int(num_classes)
        self.num_workers = check_int("data.num_workers", num_workers, 0, 64)
        for part, dataset, labels in (("train", train, self.y_train), ("test", test, self.y_test)):
            if len(dataset) == 0:
                raise DataError(f"{name}: the {part} split is empty")
            if len(dataset) != len(labels):
                raise DataError(f"{name}: the {part} Dataset has {len(dataset)} examples but "
                                f"{len(labels)} labels; they must match")
        first = as_input(train[0], f"data.train[{0}]")
        if first.ndim not in (2, 3):
            raise DataError(f"{name}: examples must have shape (C, L) or (C, H, W); example 0 "
                            f"of the training Dataset has shape {tuple(first.shape)}")
        self.input_shape: tuple[int, ...] = tuple(first.shape)
        check_labels(name, self.y_train, self.y_test, self.num_classes)
        self.examples = Examples(train, test, self.input_shape)
        self._batches = BatchList()
        self._loader: DataLoader | None = None

    def train_examples(self, idx: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Training inputs and labels at ``idx``, read in this process (small probes)."""
        x = torch.stack([self.examples[i] for i in idx.tolist()])
        return x, self.y_train[idx]

    def train_batches(
        self, batches: list[torch.Tensor]
    ) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
        """(inputs, labels) of each batch of training indices, in the order given."""
        self._batches.batches = [b.tolist() for b in batches]
        for idx, x in zip(batches, self._loaded(), strict=True):
            yield x, self.y_train[idx]

    def test_batches(self, size: int) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
        """The held-out split in order, ``size`` examples at a time."""
        n, starts = len(self.y_train), range(0, len(self.y_test), size)
        self._batches.batches = [list(range(n + b, n + min(b + size, len(self.y_test))))
                                 for b in starts]
        for begin, x in zip(starts, self._loaded(), strict=True):
            yield x, self.y_test[begin : begin + size]

    def digest(self) -> str:
        """sha256 of the data: labels, and each split's file bytes or, lacking files, inputs.

        A Dataset that names its files (a ``files`` list, or torchvision's ``samples`` of
        (path, class) pairs) is hashed by file content, each file re-read only when its size,
        times or inode changed (:mod:`periodscan.data.filehash`). Any other Dataset is read
        once, every example, and its inputs hashed: correct but as slow as an epoch of loading.
        """
        digest = hashlib.sha256()
        splits = (("train", self.train, self.y_train, 0), ("test", self.test, self.y_test,
                                                           len(self.y_train)))
        for part, dataset, labels, offset in splits:
            digest.update(f"{part} {len(labels)} {self.input_shape}".encode())
            digest.update(labels.numpy().tobytes())
            files = dataset_files(dataset)
            if files is not None:
                for hexdigest in file_digests(files):
                    digest.update(bytes.fromhex(hexdigest))
                continue
            chunk = Subset(self.examples, range(offset, offset + len(labels)))
            for x in one_pass(chunk, self.num_workers):
                digest.update(x.numpy().tobytes())
        return digest.hexdigest()

    def _loaded(self) -> DataLoader:
        if self._loader is None:
            workers = 0 if multiprocessing.current_process().daemon else self.num_workers
            self._loader = DataLoader(
                self.examples, batch_sampler=self._batches, num_workers=workers,
                persistent_workers=workers > 0, multiprocessing_context=context(workers),
                generator=torch.Generator().manual_seed(0),  # never torch's global RNG
            )
        return self._loader


class Examples(Dataset):
    """Train then test examples as one index range, inputs only, checked and as float32."""

    def __init__(self, train: Dataset, test: Dataset, shape: tuple[int, ...]) -> None:
        self.train, self.test, self.shape, self.n_train = train, test, shape, len(train)

    def __len__(self) -> int:
        return self.n_train + len(self.test)

    def __getitem__(self, i: int) -> torch.Tensor:
        part, j = ("train", i) if i < self.n_train else ("test", i - self.n_train)
        return self.checked((self.train if part == "train" else self.test)[j], part, j)

    def checked(self, item: Any, part: str, j: int) -> torch.Tensor:
        """The input of item ``j`` of split ``part`` as float32; DataError if it is malformed."""
        x = as_input(item, f"data.{part}[{j}]")
        if tuple(x.shape) != self.shape:
            raise DataError(f"data.{part}: example {j} has shape {tuple(x.shape)} but example 0 "
                            f"of the training Dataset has {self.shape}; every example must "
                            f"have the same shape")
        return x


class BatchList:
    """A ``batch_sampler`` that yields whatever batches of indices it was last given."""

    def __init__(self) -> None:
        self.batches: list[list[int]] = []

    def __iter__(self) -> Iterator[list[int]]:
        return iter(self.batches)

    def __len__(self) -> int:
        return len(self.batches)


def context(workers: int) -> Any:
    """How loader workers start: forked on Linux (fast, no pickling), spawned elsewhere."""
    if workers == 0:
        return None
    return multiprocessing.get_context("fork" if sys.platform.startswith("linux") else "spawn")


def one_pass(dataset: Dataset, num_workers: int) -> Iterator[Any]:
    """Read ``dataset`` once in order, in batches of PASS_BATCH, with loader workers.

    A loader worker's error comes back with its whole traceback in the message; it is raised
    here as one DataError line (the original error's own message).
    """
    workers = 0 if multiprocessing.current_process().daemon else num_workers
    loader = DataLoader(dataset, batch_size=PASS_BATCH, num_workers=workers,
                        multiprocessing_context=context(workers),
                        generator=torch.Generator().manual_seed(0))
    try:
        yield from loader
    except Exception as err:  # noqa: BLE001 - re-raised as one line, whatever the Dataset threw
        raise DataError(worker_error(err)) from None


def worker_error(err: BaseException) -> str:
    """One line for an error raised while reading a Dataset, in this process or a worker."""
    lines = [ln.strip() for ln in str(err).splitlines() if ln.strip()]
    if lines and lines[0].startswith("Caught ") and len(lines) > 1:  # a worker's traceback
        kind, _, text = lines[-1].partition(": ")
        if kind.endswith("DataError"):
            return text
        return f"data: reading the Dataset failed: {kind.rsplit('.', 1)[-1]}: {text}"
    if isinstance(err, DataError):
        return str(err)
    return f"data: reading the Dataset failed: {type(err).__name__}: {lines[0] if lines else ''}"


def as_input(item: Any, where: str) -> torch.Tensor:
    """The input of one ``(input, label)`` item as a float32 tensor; DataError otherwise."""
    if not isinstance(item, (tuple, list)) or len(item) < 2:
        raise DataError(f"{where}: a Dataset item must be a pair (input, label); got "
                        f"{type(item).__name__}")
    x = item[0]
    if isinstance(x, np.ndarray) and x.dtype.kind in "biuf":
        x = torch.from_numpy(x)
    if not isinstance(x, torch.Tensor) or x.is_complex():
        raise DataError(f"{where}: the input must be a real tensor or numpy array; got "
                        f"{type(x).__module__}.{type(x).__name__} (for images, add "
                        f"torchvision.transforms.PILToTensor or ToTensor)")
    return x.to(torch.float32)


def as_label(value: Any, where: str) -> int:
    """An integer class label; DataError for floats, bools, strings and one-hot vectors."""
    if isinstance(value, torch.Tensor) and value.numel() == 1 and value.ndim <= 1:
        value = value.reshape(()).numpy()[()]
    if isinstance(value, np.ndarray) and value.ndim == 0:
        value = value[()]
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        shown = (f"a tensor of shape {tuple(value.shape)}" if hasattr(value, "shape")
                 else repr(value))
        raise DataError(f"{where}: labels must be integer class indices (int or a 0-d integer "
                        f"tensor); got {shown} of type {type(value).__name__}")
    return int(value)


class Labels(Dataset):
    """The labels of a Dataset, item by item, checked (for a pass when it has no ``targets``)."""

    def __init__(self, dataset: Dataset, field: str) -> None:
        self.dataset, self.field = dataset, field

    def __len__(self) -> int:
        return len(self.dataset)

    def __getitem__(self, i: int) -> int:
        item = self.dataset[i]
        if not isinstance(item, (tuple, list)) or len(item) < 2:
            raise DataError(f"{self.field}[{i}]: a Dataset item must be a pair (input, label); "
                            f"got {type(item).__name__}")
        return as_label(item[1], f"{self.field}[{i}]")


def targets_of(dataset: Dataset) -> Any:
    """``dataset.targets`` (also through Subsets), or None when the Dataset has none."""
    if isinstance(dataset, Subset):
        inner = targets_of(dataset.dataset)
        return None if inner is None else np.asarray(inner)[np.asarray(dataset.indices)]
    return getattr(dataset, "targets", None)


def read_labels(dataset: Dataset, field: str, num_workers: int) -> torch.Tensor:
    """The label vector: from ``targets`` if present, else by one pass over the Dataset."""
    targets = targets_of(dataset)
    if targets is None:
        parts = list(one_pass(Labels(dataset, field), num_workers))
        return torch.cat(parts) if parts else torch.zeros(0, dtype=torch.int64)
    array = np.asarray(targets.numpy() if isinstance(targets, torch.Tensor) else targets)
    if array.shape != (len(dataset),):
        raise DataError(f"{field}.targets: must hold one label per example, "
                        f"({len(dataset)},); got shape {array.shape}")
    if array.dtype.kind not in "iu":
        bad = next((v for v in array.tolist() if not isinstance(v, int) or isinstance(v, bool)),
                   array.flat[0] if array.size else None)
        raise DataError(f"{field}.targets: labels must be integer class indices; got "
                        f"{bad!r} (dtype {array.dtype})")
    return torch.from_numpy(array.astype(np.int64))


def dataset_files(dataset: Dataset) -> list[str] | None:
    """The path of the file behind each example (``files``, or torchvision's ``samples``).

    None when the Dataset names no files, or names something else than one path per example.
    """
    if isinstance(dataset, Subset):
        inner = dataset_files(dataset.dataset)
        return None if inner is None else [inner[i] for i in dataset.indices]
    files = getattr(dataset, "files", None)
    samples = getattr(dataset, "samples", None)
    if files is None and isinstance(samples, Sequence):
        files = [s[0] if isinstance(s, (tuple, list)) else None for s in samples]
    if files is None or len(files) != len(dataset):
        return None
    if not all(isinstance(f, (str, bytes, os.PathLike)) for f in files):
        return None
    return [os.fsdecode(f) for f in files]


def check_examples(data: StreamData, count: int = 8) -> None:
    """Read a few examples of each split as training will, twice; DataError on the first fault.

    Checks that each item is (input, integer label), that the label equals the label vector's
    (``targets`` must agree with ``__getitem__``), that the input has the shape of example 0
    and finite values, and that a second read returns the same input and label.
    """
    for part, dataset, labels in (("train", data.train, data.y_train),
                                  ("test", data.test, data.y_test)):
        n = len(labels)
        for j in sorted({int(k) for k in np.linspace(0, n - 1, min(count, n))}):
            where = f"data.{part}[{j}]"
            (x, y), (x2, y2) = [(data.examples.checked(item, part, j), as_label(item[1], where))
                                for item in (dataset[j], dataset[j])]
            if y != int(labels[j]):
                raise DataError(f"{where}: the item's label is {y} but the Dataset's targets "
                                f"say {int(labels[j])}; they must agree")
            if not torch.isfinite(x).all():
                raise DataError(f"{where}: the input contains NaN or infinite values")
            if not torch.equal(x, x2) or y != y2:
                raise DataError(f"{where}: two reads of the same example differ; __getitem__ "
                                f"must depend only on the index (random augmentation belongs "
                                f"in schedule.augment or a deficit)")


def load_dataset(train: Dataset, test: Dataset | None = None, num_classes: int | None = None,
                 test_fraction: float = 0.2, split_seed: int = 0, num_workers: int = 2,
                 n_train: int | None = None, n_test: int | None = None,
                 name: str | None = None) -> StreamData:
    """Stream a map-style Dataset of your own (``data=dataset``).

    Parameters
    ----------
    train, test : Datasets whose ``__getitem__(i)`` returns ``(input, label)``: a float tensor
        or array of shape (C, L) or (C, H, W), the same for every example, and an integer
        class label. Inputs are used as given (normalise in the Dataset). ``test=None`` holds
        out a stratified ``test_fraction`` of ``train``, fixed by ``split_seed``.
    num_classes : number of classes; None: largest label + 1.
    num_workers : DataLoader worker processes reading examples (0: read in the training
        process). It changes speed only, never the numbers.
    n_train, n_test : keep at most this many examples of each split (None: all), drawn with
        ``split_seed`` after the split, as the in-memory loaders do.
    """
    if not isinstance(train, Dataset) or (test is not None and not isinstance(test, Dataset)):
        got = type(train if not isinstance(train, Dataset) else test).__name__
        raise DataError(f"data.train and data.test must build torch.utils.data.Dataset "
                        f"objects (map-style); got {got}")
    num_workers = check_int("data.num_workers", num_workers, 0, 64)
    split_seed = check_int("data.split_seed", split_seed, 0)
    n_train, n_test = check_caps(n_train, n_test)
    y = read_labels(train, "data.train", num_workers)
    if test is None:
        y_check = y.numpy()
        fraction = check_fraction("data.test_fraction", test_fraction)
        train_idx, test_idx = stratified_split(y_check, fraction, split_seed, "data.train")
        test, y_test = Subset(train, test_idx.tolist()), y[test_idx]
        train, y = Subset(train, train_idx.tolist()), y[train_idx]
    else:
        y_test = read_labels(test, "data.test", num_workers)
    train, y, test, y_test = _capped(train, y, test, y_test, n_train, n_test, split_seed)
    if num_classes is None:
        num_classes = max(int(torch.cat([y, y_test]).max()) + 1, 2)
    num_classes = check_int("data.num_classes", num_classes, 2)
    return StreamData(train, test, y, y_test, num_classes, num_workers,
                      name=name or type(train.dataset if isinstance(train, Subset)
                                         else train).__name__)


def _capped(train: Dataset, y: torch.Tensor, test: Dataset, y_test: torch.Tensor,
            n_train: int | None, n_test: int | None, seed: int) -> tuple:
    """Apply the n_train/n_test caps with prep.cap_split (unchanged when both are None)."""
    if n_train is None and n_test is None:
        return train, y, test, y_test
    keep, keep_test = cap_split(np.arange(len(y)), np.arange(len(y_test)), n_train, n_test, seed)
    return (Subset(train, keep.tolist()), y[keep], Subset(test, keep_test.tolist()),
            y_test[keep_test])

