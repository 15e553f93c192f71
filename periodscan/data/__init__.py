"""Datasets: built-in, procedural and the user's own, in memory or streamed.

Every loader is a plain function returning :class:`TensorData` (in-memory tensors, the fast
default) or :class:`StreamData` (a Dataset read through a DataLoader, for data too large for
memory); a data config names one with ``_target_`` and the engine builds it with
``hydra.utils.instantiate``.
"""

from periodscan.data.arrays import load_npz
from periodscan.data.base import TensorData
from periodscan.data.digits import load_digits
from periodscan.data.folder import load_image_folder
from periodscan.data.folder_stream import stream_image_folder
from periodscan.data.mnist1d import load_mnist1d
from periodscan.data.procedural import load_patterns, load_waves
from periodscan.data.stream import StreamData, load_dataset
from periodscan.data.torchvision_local import load_torchvision

__all__ = [
    "StreamData",
    "TensorData",
    "load_dataset",
    "load_digits",
    "load_image_folder",
    "load_mnist1d",
    "load_npz",
    "load_patterns",
    "load_torchvision",
    "load_waves",
    "stream_image_folder",
]
