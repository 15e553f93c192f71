"""Our own seeded procedural datasets, built so that fine detail carries part of the label.

Each task mixes coarse structure, which survives blurring, with fine structure, which does
not, so an input-blur deficit removes exactly the evidence some classes depend on. They take
milliseconds to generate and need nothing but numpy.

- ``waves``: 1-D signals. Classes come in pairs: classes 2j and 2j+1 share a coarse shape (two
  slow sinusoids) and differ only in a short high-frequency ripple (12 vs 20 cycles per 64
  samples; after 4x average pooling both fold onto 4 cycles and look alike).
- ``patterns``: 16x16 Gabor patches. Class k has one of four orientations (k mod 4) and a coarse
  or a fine stripe period (k div 4); once blurred, fine stripes lose their orientation.
"""

from __future__ import annotations

import itertools

import numpy as np

from periodscan.data.base import TensorData
from periodscan.data.prep import check_int, standardize
from periodscan.errors import bad_value

_RIPPLE_CYCLES = (12.0, 20.0)  # per signal length: both alias to 4 cycles after 4x pooling
_ORIENTATIONS = 4
_STRIPE_CYCLES = (2.0, 5.5)  # per canvas width: coarse and fine stripes


def load_waves(
    n_classes: int = 8,
    n_train: int = 2000,
    n_test: int = 1000,
    length: int = 64,
    noise: float = 0.25,
    seed: int = 0,
) -> TensorData:
    """Seeded 1-D signals (N, 1, length) of ``n_classes`` balanced classes.

    An example of class k is ``a * shape[k // 2] + b * ripple[k % 2]`` (ripple in a Gaussian
    window at a jittered position), circularly shifted by a uniform random offset, plus white
    noise of std ``noise``. The class shapes are fixed; ``seed`` draws the examples. Inputs are
    standardised with training-split statistics.
    """
    n_classes = check_int("data.n_classes", n_classes, 2, 30)
    n_train = check_int("data.n_train", n_train, n_classes)
    n_test = check_int("data.n_test", n_test, n_classes)
    length = check_int("data.length", length, 32, 4096)
    noise = _check_noise(noise)
    seed = check_int("data.seed", seed, 0)

    rng = np.random.default_rng(seed)
    parts = [_wave_examples(n, n_classes, length, noise, rng) for n in (n_train, n_test)]
    (x_train, y_train), (x_test, y_test) = parts
    x_train, x_test = standardize(x_train, x_test)
    return TensorData(x_train, y_train, x_test, y_test, num_classes=n_classes, name="waves")


def load_patterns(
    n_classes: int = 8,
    n_train: int = 2000,
    n_test: int = 1000,
    size: int = 16,
    noise: float = 0.6,
    seed: int = 0,
) -> TensorData:
    """Seeded Gabor-patch images (N, 1, size, size) of ``n_classes`` (2 to 8) balanced classes.

    Class k: orientation ``(k mod 4) * 45`` degrees (jitter +-8), stripe period coarse for
    k < 4 and fine otherwise; random phase, contrast and patch centre; white noise of std
    ``noise``. Inputs are standardised with training-split statistics.
    """
    n_classes = check_int("data.n_classes", n_classes, 2, _ORIENTATIONS * len(_STRIPE_CYCLES))
    n_train = check_int("data.n_train", n_train, n_classes)
    n_test = check_int("data.n_test", n_test, n_classes)
    size = check_int("data.size", size, 8, 256)
    noise = _check_noise(noise)
    seed = check_int("data.seed", seed, 0)

    rng = np.random.default_rng(seed)
    parts = [_pattern_examples(n, n_classes, size, noise, rng) for n in (n_train, n_test)]
    (x_train, y_train), (x_test, y_test) = parts
    x_train, x_test = standardize(x_train, x_test)
    return TensorData(x_train, y_train, x_test, y_test, num_classes=n_classes, name="patterns")


def _check_noise(noise: object) -> float:
    if isinstance(noise, bool) or not isinstance(noise, (int, float)) or not 0 <= noise <= 10:
        raise bad_value("data.noise", "a float in the range [0, 10]", noise)
    return float(noise)


def _balanced_labels(n: int, n_classes: int, rng: np.random.Generator) -> np.ndarray:
    """Labels whose class counts differ by at most one, in random order."""
    return rng.permutation(np.arange(n) % n_classes).astype(np.int64)


def _wave_shapes(n_shapes: int, t: np.ndarray) -> np.ndarray:
    """Fixed coarse shapes sin(2 pi a t) + 0.6 sin(2 pi b t + 1), one pair 1 <= a < b <= 6 each."""
    pairs = list(itertools.combinations(range(1, 7), 2))[:n_shapes]
    wave = [np.sin(2 * np.pi * a * t) + 0.6 * np.sin(2 * np.pi * b * t + 1) for a, b in pairs]
    return np.stack(wave)


def _wave_examples(
    n: int, n_classes: int, length: int, noise: float, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    y = _balanced_labels(n, n_classes, rng)
    t = np.arange(length) / length
    shapes = _wave_shapes((n_classes + 1) // 2, t)
    amp = rng.uniform(0.7, 1.3, size=(n, 1))
    centre = rng.uniform(0.35, 0.65, size=(n, 1))
    ripple_amp = rng.uniform(0.6, 1.0, size=(n, 1))
    cycles = np.asarray(_RIPPLE_CYCLES)[y % 2][:, None]
    window = np.exp(-0.5 * ((t - centre) / 0.1) ** 2)
    x = amp * shapes[y // 2] + ripple_amp * window * np.sin(2 * np.pi * cycles * (t - centre))
    shift = rng.integers(0, length, size=(n, 1))
    x = np.take_along_axis(x, (np.arange(length) - shift) % length, axis=1)  # circular shift
    x = x + noise * rng.standard_normal(x.shape)
    return x[:, None].astype(np.float32), y


def _pattern_examples(
    n: int, n_classes: int, size: int, noise: float, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    y = _balanced_labels(n, n_classes, rng)
    angle = np.pi * (y % _ORIENTATIONS) / _ORIENTATIONS + np.deg2rad(rng.uniform(-8, 8, n))
    freq = np.asarray(_STRIPE_CYCLES)[y // _ORIENTATIONS] / size  # cycles per pixel
    phase = rng.uniform(0, 2 * np.pi, n)
    contrast = rng.uniform(0.6, 1.2, n)
    cy, cx = (rng.uniform(0.35, 0.65, (2, n)) * size)[:, :, None, None]
    rows, cols = np.mgrid[0:size, 0:size].astype(np.float64)
    along = np.cos(angle)[:, None, None] * cols + np.sin(angle)[:, None, None] * rows
    stripes = np.cos(2 * np.pi * freq[:, None, None] * along + phase[:, None, None])
    window = np.exp(-((rows - cy) ** 2 + (cols - cx) ** 2) / (2 * (size / 4) ** 2))
    x = contrast[:, None, None] * window * stripes + noise * rng.standard_normal((n, size, size))
    return x[:, None].astype(np.float32), y
