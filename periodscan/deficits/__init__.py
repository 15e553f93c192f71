"""Deficits: temporary changes to the training stream, built in or user-supplied.

A user deficit subclasses :class:`Deficit` and is named in config with ``_target_``, exactly
like the built-ins listed in ``configs/deficit/``.
"""

from periodscan.deficits.base import Deficit
from periodscan.deficits.builtin import (
    Blur,
    ClassDropout,
    Contrast,
    Crop,
    DataOutage,
    Downsample,
    LabelNoise,
    LabelPermutation,
    NoAugmentation,
    Noise,
    Occlusion,
    VerticalFlip,
)
from periodscan.deficits.curriculum import Curriculum

__all__ = [
    "Blur",
    "ClassDropout",
    "Contrast",
    "Crop",
    "Curriculum",
    "DataOutage",
    "Deficit",
    "Downsample",
    "LabelNoise",
    "LabelPermutation",
    "NoAugmentation",
    "Noise",
    "Occlusion",
    "VerticalFlip",
]
