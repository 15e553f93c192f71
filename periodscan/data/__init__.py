"""Datasets as in-memory tensors: built-in, procedural and the user's own.

Every loader is a plain function returning :class:`TensorData`; a data config names one with
``_target_`` and the engine builds it with ``hydra.utils.instantiate``.
"""

from periodscan.data.arrays import load_npz
from periodscan.data.base import TensorData
from periodscan.data.digits import load_digits
from periodscan.data.folder import load_image_folder
from periodscan.data.mnist1d import load_mnist1d
from periodscan.data.procedural import load_patterns, load_waves
from periodscan.data.torchvision_local import load_torchvision

__all__ = [
    "TensorData",
    "load_digits",
    "load_image_folder",
    "load_mnist1d",
    "load_npz",
    "load_patterns",
    "load_torchvision",
    "load_waves",
]
