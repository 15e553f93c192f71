"""Stateless batched kernels behind the built-in deficits.

Each function is a pure map of a batch and explicit parameters (random offsets already drawn,
or a ``torch.Generator`` passed in), so a deficit class only has to draw its parameters and call
one of these. Inputs are ``(N, C, L)`` signals or ``(N, C, H, W)`` images; every kernel keeps the
shape and dtype of ``x``. "Spatial axes" means ``L`` for signals and ``(H, W)`` for images.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F


def spatial_dims(x: torch.Tensor) -> tuple[int, ...]:
    """Positions of the spatial axes of a ``(N, C, L)`` or ``(N, C, H, W)`` batch."""
    if x.ndim not in (3, 4):
        raise ValueError(f"expected a (N, C, L) or (N, C, H, W) batch; got shape {tuple(x.shape)}")
    return tuple(range(2, x.ndim))


def _mirror_index(n: int, radius: int) -> torch.Tensor:
    """Indices of positions ``-radius .. n-1+radius`` under whole-sample mirroring.

    This is torch's "reflect" and scipy.ndimage's "mirror" (``d c b | a b c d | c b a``), applied
    repeatedly, so a radius longer than the axis is fine: the signal is extended with period
    ``2 (n - 1)``, as scipy does.
    """
    pos = torch.arange(-radius, n + radius)
    if n == 1:
        return torch.zeros_like(pos)
    period = 2 * (n - 1)
    m = pos.remainder(period)
    return torch.where(m < n, m, period - m)


def gaussian_kernel1d(sigma: float, truncate: float = 4.0) -> torch.Tensor:
    """Normalised Gaussian weights on ``[-r, r]`` with ``r = int(truncate * sigma + 0.5)``."""
    radius = int(truncate * sigma + 0.5)
    t = torch.arange(-radius, radius + 1, dtype=torch.float64)
    w = torch.exp(-0.5 * (t / sigma) ** 2)
    return w / w.sum()


def _filter_axis(x: torch.Tensor, weights: torch.Tensor, dim: int) -> torch.Tensor:
    """Correlate every line of ``x`` along ``dim`` with ``weights`` (mirror padding)."""
    radius = (len(weights) - 1) // 2
    moved = x.movedim(dim, -1)
    n = moved.shape[-1]
    lines = moved.reshape(-1, 1, n).index_select(-1, _mirror_index(n, radius).to(x.device))
    out = F.conv1d(lines, weights.to(x.dtype).to(x.device).view(1, 1, -1))
    return out.reshape(moved.shape).movedim(-1, dim)


def gaussian_blur(x: torch.Tensor, sigma: float, truncate: float = 4.0) -> torch.Tensor:
    """Separable Gaussian blur along the spatial axes, mirror-padded.

    Matches ``scipy.ndimage.gaussian_filter(x, sigma, mode="mirror", truncate=truncate,
    axes=spatial axes)``, including radii longer than an axis.
    """
    weights = gaussian_kernel1d(sigma, truncate)
    for dim in spatial_dims(x):
        x = _filter_axis(x, weights, dim)
    return x


def downsample(x: torch.Tensor, factor: int, mode: str = "linear") -> torch.Tensor:
    """Average blocks of ``factor`` positions per spatial axis, then resize back.

    An axis whose length is not a multiple of ``factor`` ends with a shorter block, averaged
    over what it holds; an axis shorter than ``factor`` becomes one block. ``mode`` is
    "linear" (linear / bilinear, ``align_corners=False``) or "nearest".
    """
    dims = spatial_dims(x)
    size = tuple(x.shape[d] for d in dims)
    kernel = tuple(min(factor, n) for n in size)
    if len(dims) == 1:
        low = F.avg_pool1d(x, kernel, kernel, ceil_mode=True)
    else:
        low = F.avg_pool2d(x, kernel, kernel, ceil_mode=True)
    if mode == "nearest":
        return F.interpolate(low, size=size, mode="nearest")
    return F.interpolate(low, size=size, mode=("linear", "bilinear")[len(dims) - 1],
                         align_corners=False)


def _crop_coords(start: torch.Tensor, keep: float, n: int) -> torch.Tensor:
    """Normalised grid_sample coordinates of an ``n``-point resize of ``[start, start+keep*n)``.

    Pixel ``j`` of the output samples source position ``start + (j + 0.5) * keep - 0.5`` (the
    half-pixel convention of ``align_corners=False``). Shape ``(N, n)``.
    """
    pos = start.double()[:, None] + (torch.arange(n, dtype=torch.float64) + 0.5) * keep - 0.5
    return (2.0 * pos + 1.0) / n - 1.0


def resized_crop(x: torch.Tensor, start: torch.Tensor, keep: float) -> torch.Tensor:
    """Crop fraction ``keep`` of every spatial axis at ``start`` and resize back (bilinear).

    ``start`` is ``(N, D)`` float pixel offsets, one per spatial axis, each in
    ``[0, n_d (1 - keep)]``. Signals are treated as images of height 1.
    """
    dims = spatial_dims(x)
    img = x if len(dims) == 2 else x.unsqueeze(2)
    n, _, h, w = img.shape
    gx = _crop_coords(start[:, -1], keep, w)
    gy = _crop_coords(start[:, 0], keep, h) if len(dims) == 2 else torch.zeros(n, 1, dtype=gx.dtype)
    grid = torch.stack([gx[:, None, :].expand(n, h, w), gy[:, :, None].expand(n, h, w)], dim=-1)
    out = F.grid_sample(img, grid.to(x.dtype), mode="bilinear", padding_mode="border",
                        align_corners=False)
    return out if len(dims) == 2 else out.squeeze(2)


def occlude(x: torch.Tensor, start: torch.Tensor, side: tuple[int, ...]) -> torch.Tensor:
    """Zero, in every channel, the box ``[start_d, start_d + side_d)`` of each example.

    ``start`` is ``(N, D)`` integer offsets, one per spatial axis.
    """
    dims = spatial_dims(x)
    inside = []
    for k, d in enumerate(dims):
        pos = torch.arange(x.shape[d], device=x.device)
        lo = start[:, k, None].to(x.device)
        inside.append((pos >= lo) & (pos < lo + side[k]))  # (N, n_d)
    mask = inside[0] if len(dims) == 1 else inside[0][:, :, None] & inside[1][:, None, :]
    return x.masked_fill(mask.unsqueeze(1), 0.0)


def gaussian_noise(x: torch.Tensor, std: float, gen: torch.Generator) -> torch.Tensor:
    """Add independent ``N(0, std^2)`` noise drawn from ``gen`` to every entry."""
    noise = torch.randn(x.shape, generator=gen, dtype=x.dtype, device=gen.device)
    return x + std * noise.to(x.device)


def reduce_contrast(x: torch.Tensor, factor: float) -> torch.Tensor:
    """Blend each example toward its own mean (over channels and positions): ``m + f (x - m)``."""
    mean = x.mean(dim=tuple(range(1, x.ndim)), keepdim=True)
    return mean + factor * (x - mean)


def vertical_flip(x: torch.Tensor) -> torch.Tensor:
    """Flip images along H; turn signals upside down (``x -> -x``), their only vertical axis."""
    return x.flip(-2) if len(spatial_dims(x)) == 2 else -x


def shift_labels(y: torch.Tensor, mask: torch.Tensor, offset: torch.Tensor, k: int) -> torch.Tensor:
    """Replace ``y`` by ``(y + offset) mod k`` where ``mask`` holds.

    With ``offset`` uniform on ``1 .. k-1`` the new label is uniform over the *other* classes.
    """
    return torch.where(mask, (y + offset).remainder(k), y)


def permute_labels(y: torch.Tensor, perm: torch.Tensor) -> torch.Tensor:
    """Map class ``c`` to ``perm[c]``."""
    return perm[y]
