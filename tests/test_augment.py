"""Tests of the ordinary training augmentation (random zero-fill shifts and horizontal flips)."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import torch
from scipy import stats

from periodscan.augment import augment_batch

SHAPES = [(40, 2, 16), (40, 3, 9, 7)]


def _gen(seed: int) -> torch.Generator:
    return torch.Generator().manual_seed(seed)


def _shifted(a: np.ndarray, offsets: tuple[int, ...]) -> np.ndarray:
    """Direct numpy reference: out[i] = a[i - offset] on each spatial axis, zero elsewhere."""
    out = np.zeros_like(a)
    dst, src = [slice(None)], [slice(None)]
    for off, n in zip(offsets, a.shape[1:], strict=True):
        dst.append(slice(max(off, 0), n + min(off, 0)))
        src.append(slice(max(-off, 0), n - max(off, 0)))
    out[tuple(dst)] = a[tuple(src)]
    return out


@pytest.mark.parametrize("shape", SHAPES)
def test_no_shift_no_flip_is_the_identity(shape):
    x = torch.randn(*shape, generator=_gen(0))
    assert torch.equal(augment_batch(x, _gen(1)), x)
    assert torch.equal(augment_batch(x, _gen(1), max_shift=0, hflip=False), x)


@pytest.mark.parametrize("shape", SHAPES)
@pytest.mark.parametrize("max_shift, hflip", [(2, False), (0, True), (3, True)])
def test_shape_dtype_determinism_and_global_rng(shape, max_shift, hflip):
    x = torch.randn(*shape, generator=_gen(0))
    rng = torch.get_rng_state()
    out = augment_batch(x, _gen(5), max_shift, hflip)
    assert torch.equal(torch.get_rng_state(), rng)  # only the given generator is drawn from
    assert out.shape == x.shape and out.dtype == x.dtype
    assert torch.equal(out, augment_batch(x, _gen(5), max_shift, hflip))
    assert not torch.equal(out, augment_batch(x, _gen(6), max_shift, hflip))


@pytest.mark.parametrize("shape", SHAPES)
def test_hflip_flips_the_last_axis_of_about_half(shape):
    x = torch.randn(2000, *shape[1:], generator=_gen(0))
    out = augment_batch(x, _gen(2), hflip=True)
    same = (out == x).flatten(1).all(1)
    flipped = (out == x.flip(-1)).flatten(1).all(1)
    assert (same ^ flipped).all()  # each example is either untouched or mirrored
    # Reference: exact binomial test of a fair coin, scipy.stats.binomtest (fixed seed).
    assert stats.binomtest(int(flipped.sum()), len(x), 0.5).pvalue > 1e-3


@pytest.mark.parametrize("shape", SHAPES)
@pytest.mark.parametrize("max_shift", [1, 3])
def test_shift_is_a_zero_filled_translation_within_range(shape, max_shift):
    x = torch.randn(300, *shape[1:], generator=_gen(0))
    out = augment_batch(x, _gen(3), max_shift=max_shift).numpy()
    candidates = list(itertools.product(range(-max_shift, max_shift + 1), repeat=len(shape) - 2))
    seen = set()
    for a, b in zip(x.numpy(), out, strict=True):
        match = [off for off in candidates if np.array_equal(_shifted(a, off), b)]
        assert len(match) == 1, "each example must be exactly one allowed zero-fill shift"
        seen.add(match[0])
    assert seen == set(candidates)  # every allowed offset occurs in 300 draws
