"""The built-in deficits: the data lapses a training pipeline typically suffers.

Each class validates its parameters once, in the constructor (or in :meth:`prepare` when the
check needs the dataset), draws its random parameters from the generator it is handed, and
calls a pure kernel from :mod:`periodscan.deficits.functional`. Choices fixed for a whole run
(which labels are wrong, which shard is down) are drawn in ``prepare`` from the per-run
generator; per-epoch choices that must not depend on batch order are drawn in ``select``.
"""

from __future__ import annotations

import math

import torch

from periodscan.data.base import TensorData
from periodscan.deficits import functional as K
from periodscan.deficits.base import Deficit
from periodscan.errors import bad_value

Tensor = torch.Tensor
Batch = tuple[Tensor, Tensor]


def _number(field: str, value: object, lo: float, hi: float, lo_open: bool = False,
            hi_open: bool = False) -> float:
    """Return ``value`` as a float if it is a real number in the given interval."""
    allowed = f"a float in {'(' if lo_open else '['}{lo:g}, {hi:g}{')' if hi_open else ']'}"
    if hi == math.inf:
        allowed = f"a float {'>' if lo_open else '>='} {lo:g}"
    ok = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
    if ok:
        ok = (value > lo if lo_open else value >= lo) and (value < hi if hi_open else value <= hi)
    if not ok:
        raise bad_value(field, allowed, value)
    return float(value)


def _integer(field: str, value: object, lo: int) -> int:
    """Return ``value`` if it is an int ``>= lo``."""
    if not isinstance(value, int) or isinstance(value, bool) or value < lo:
        raise bad_value(field, f"an int >= {lo}", value)
    return value


def _prepared(value: object, name: str) -> None:
    """Guard against an engine that forgot to call ``prepare`` (an internal bug, not user error)."""
    if value is None:
        raise RuntimeError(f"{name}.prepare() must be called before select() or apply()")


class Blur(Deficit):
    """Gaussian blur of every input (a preprocessing bug that ships soft images).

    Mirror padding and radius ``int(4 sigma + 0.5)``, as ``scipy.ndimage.gaussian_filter``;
    signals are blurred along L, images along H and W.
    """

    def __init__(self, sigma: float) -> None:
        self.sigma = _number("deficit.sigma", sigma, 0.0, math.inf, lo_open=True)

    def apply(self, x: Tensor, y: Tensor, idx: Tensor, gen: torch.Generator) -> Batch:
        return K.gaussian_blur(x, self.sigma), y


class Downsample(Deficit):
    """Low-resolution input: average blocks of ``factor`` positions, then resize back.

    ``mode`` is "linear" (bilinear for images) or "nearest". A trailing partial block is
    averaged over what it holds.
    """

    def __init__(self, factor: int = 4, mode: str = "linear") -> None:
        self.factor = _integer("deficit.factor", factor, 2)
        if mode not in ("linear", "nearest"):
            raise bad_value("deficit.mode", "one of 'linear', 'nearest'", mode)
        self.mode = mode

    def apply(self, x: Tensor, y: Tensor, idx: Tensor, gen: torch.Generator) -> Batch:
        return K.downsample(x, self.factor, self.mode), y


class Crop(Deficit):
    """A random crop keeping fraction ``keep`` of each spatial axis, stretched back to full size.

    The crop position is uniform per example (continuous, bilinear resampling); signals are
    cropped along L.
    """

    def __init__(self, keep: float) -> None:
        self.keep = _number("deficit.keep", keep, 0.0, 1.0, lo_open=True)

    def apply(self, x: Tensor, y: Tensor, idx: Tensor, gen: torch.Generator) -> Batch:
        size = torch.tensor([x.shape[d] for d in K.spatial_dims(x)], dtype=torch.float64)
        u = torch.rand(len(x), len(size), generator=gen, dtype=torch.float64)
        return K.resized_crop(x, u * size * (1.0 - self.keep), self.keep), y


class Occlusion(Deficit):
    """Zero a random box whose side is fraction ``size`` of each spatial axis (at least 1).

    The position is uniform per example; signals lose a stretch of L, images a rectangle.
    """

    def __init__(self, size: float) -> None:
        self.size = _number("deficit.size", size, 0.0, 1.0, lo_open=True)

    def apply(self, x: Tensor, y: Tensor, idx: Tensor, gen: torch.Generator) -> Batch:
        lengths = [x.shape[d] for d in K.spatial_dims(x)]
        side = tuple(max(1, round(self.size * n)) for n in lengths)
        room = [n - s + 1 for n, s in zip(lengths, side, strict=True)]
        room = torch.tensor(room, dtype=torch.float64)
        u = torch.rand(len(x), len(lengths), generator=gen, dtype=torch.float64)
        start = (u * room).floor().long()
        return K.occlude(x, start, side), y


class Noise(Deficit):
    """Additive Gaussian noise of standard deviation ``std`` on every entry (any rank)."""

    def __init__(self, std: float) -> None:
        self.std = _number("deficit.std", std, 0.0, math.inf, lo_open=True)

    def apply(self, x: Tensor, y: Tensor, idx: Tensor, gen: torch.Generator) -> Batch:
        return K.gaussian_noise(x, self.std, gen), y


class Contrast(Deficit):
    """Washed-out inputs: each example blended toward its own mean, ``m + factor (x - m)``.

    ``m`` is one number per example, the mean over channels and positions (signals and images
    alike); factor 1 leaves the data unchanged, 0 makes every example constant.
    """

    def __init__(self, factor: float) -> None:
        self.factor = _number("deficit.factor", factor, 0.0, 1.0)

    def apply(self, x: Tensor, y: Tensor, idx: Tensor, gen: torch.Generator) -> Batch:
        return K.reduce_contrast(x, self.factor), y


class VerticalFlip(Deficit):
    """Upside-down inputs: images flipped along H, signals negated (``x -> -x``)."""

    def apply(self, x: Tensor, y: Tensor, idx: Tensor, gen: torch.Generator) -> Batch:
        return K.vertical_flip(x), y


class NoAugmentation(Deficit):
    """The schedule's augmentation is switched off; the data itself is unchanged."""

    disables_augmentation = True


class LabelNoise(Deficit):
    """Each label replaced, with probability ``rate``, by a uniformly random different class.

    By default which examples are wrong, and how, is fixed for the run (a noisy vendor batch
    stays noisy); with ``resample_each_epoch`` it is redrawn every epoch.
    """

    def __init__(self, rate: float, resample_each_epoch: bool = False) -> None:
        self.rate = _number("deficit.rate", rate, 0.0, 1.0)
        if not isinstance(resample_each_epoch, bool):
            raise bad_value("deficit.resample_each_epoch", "a bool", resample_each_epoch)
        self.resample_each_epoch = resample_each_epoch
        self._mask: torch.Tensor | None = None
        self._offset: torch.Tensor | None = None
        self._classes: int | None = None

    def _draw(self, n: int, gen: torch.Generator) -> None:
        # One entry per training example, looked up by index: independent of batch order.
        self._mask = torch.rand(n, generator=gen) < self.rate
        self._offset = torch.randint(1, self._classes, (n,), generator=gen)

    def prepare(self, data: TensorData, gen: torch.Generator) -> None:
        self._classes = data.num_classes
        self._draw(len(data.y_train), gen)

    def select(self, order: Tensor, data: TensorData, gen: torch.Generator) -> Tensor:
        _prepared(self._classes, "LabelNoise")
        if self.resample_each_epoch:
            self._draw(len(data.y_train), gen)
        return order

    def apply(self, x: Tensor, y: Tensor, idx: Tensor, gen: torch.Generator) -> Batch:
        _prepared(self._mask, "LabelNoise")
        return x, K.shift_labels(y, self._mask[idx], self._offset[idx], self._classes)


class LabelPermutation(Deficit):
    """Systematic mislabelling: class ``c`` is always labelled ``perm[c]``, a fixed random
    permutation of the classes with no fixed point (a derangement), drawn once per run."""

    def __init__(self) -> None:
        self._perm: torch.Tensor | None = None

    def prepare(self, data: TensorData, gen: torch.Generator) -> None:
        # Rejection sampling gives a uniform derangement; about e ~ 2.7 draws on average.
        classes = torch.arange(data.num_classes)
        perm = torch.randperm(data.num_classes, generator=gen)
        while (perm == classes).any():
            perm = torch.randperm(data.num_classes, generator=gen)
        self._perm = perm

    def apply(self, x: Tensor, y: Tensor, idx: Tensor, gen: torch.Generator) -> Batch:
        _prepared(self._perm, "LabelPermutation")
        return x, K.permute_labels(y, self._perm)


class ClassDropout(Deficit):
    """Some classes vanish from the training stream.

    ``classes`` names them; when it is None, ``count`` classes are drawn once per run.
    """

    def __init__(self, classes: list[int] | None = None, count: int = 1) -> None:
        if classes is not None:
            classes = list(classes) if not isinstance(classes, (str, bytes)) else [classes]
            if not classes or any(not isinstance(c, int) or isinstance(c, bool) or c < 0
                                  for c in classes) or len(set(classes)) < len(classes):
                raise bad_value("deficit.classes", "null or a non-empty list of distinct class "
                                "indices >= 0", classes)
        self.classes = classes
        self.count = _integer("deficit.count", count, 1)
        self._dropped: torch.Tensor | None = None

    def prepare(self, data: TensorData, gen: torch.Generator) -> None:
        k = data.num_classes
        if self.classes is None:
            if self.count >= k:
                raise bad_value("deficit.count", f"an int in [1, {k - 1}] (the data has {k} "
                                "classes; at least one must remain)", self.count)
            dropped = torch.randperm(k, generator=gen)[: self.count].sort().values
        else:
            if max(self.classes) >= k or len(self.classes) >= k:
                raise bad_value("deficit.classes", f"distinct class indices in [0, {k - 1}], "
                                "leaving at least one class", self.classes)
            dropped = torch.tensor(sorted(self.classes))
        self._dropped = dropped

    def select(self, order: Tensor, data: TensorData, gen: torch.Generator) -> Tensor:
        _prepared(self._dropped, "ClassDropout")
        return order[~torch.isin(data.y_train[order], self._dropped)]


class DataOutage(Deficit):
    """A fixed shard, fraction ``fraction`` of the training set, is unavailable.

    The shard is a random subset of examples drawn once per run (a shard of a shuffled
    dataset), the same in every deficit epoch; at least one example always remains.
    """

    def __init__(self, fraction: float) -> None:
        self.fraction = _number("deficit.fraction", fraction, 0.0, 1.0, hi_open=True)
        self._down: torch.Tensor | None = None

    def prepare(self, data: TensorData, gen: torch.Generator) -> None:
        n = len(data.y_train)
        down = torch.zeros(n, dtype=torch.bool)
        shard = min(round(self.fraction * n), n - 1)  # never the whole training set
        down[torch.randperm(n, generator=gen)[:shard]] = True
        self._down = down

    def select(self, order: Tensor, data: TensorData, gen: torch.Generator) -> Tensor:
        _prepared(self._down, "DataOutage")
        return order[~self._down[order]]


__all__ = [
    "Blur", "ClassDropout", "Contrast", "Crop", "DataOutage", "Downsample", "LabelNoise",
    "LabelPermutation", "NoAugmentation", "Noise", "Occlusion", "VerticalFlip",
]
