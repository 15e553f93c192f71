"""Built-in classifiers, and the contract any model must meet to plug into periodscan.

A model is chosen in the ``model`` config group by ``_target_``; built-ins and user models are
plugged in the same way. The engine seeds torch's global RNG, then builds the model with::

    hydra.utils.instantiate(cfg.model, input_shape=data.input_shape, num_classes=data.num_classes)

So a user's own ``torch.nn.Module`` must

- accept the keyword arguments ``input_shape`` (a sequence of ints: (C, L) for 1-D signals or
  (C, H, W) for images; Hydra may hand it over as a ``ListConfig``, so convert with ``tuple``)
  and ``num_classes`` (int), besides its own options from the YAML file;
- map a float32 batch of shape (N, *input_shape) to logits of shape (N, num_classes);
- draw random numbers only at construction (initialisation) and in forward only through
  ``nn.Dropout``: the engine reseeds the global RNG at every epoch start, and exact branching
  relies on that being the only randomness;
- keep all state that training changes in ``state_dict()`` (parameters and buffers such as
  BatchNorm running statistics), so a checkpoint resumes bit for bit;
- be picklable (defined at module level in an importable module), for parallel executors.

Example option file ``configs/model/my_net.yaml``::

    _target_: mypackage.nets.MyNet
    depth: 4

Built-ins: :class:`MLP`, :class:`CNN1d` (default demo), :class:`CNN2d`, :class:`TinyResNet`.
"""

from periodscan.models.cnn import CNN1d, CNN2d
from periodscan.models.mlp import MLP
from periodscan.models.resnet import TinyResNet

__all__ = ["CNN1d", "CNN2d", "MLP", "TinyResNet"]
