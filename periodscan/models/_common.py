"""Argument checks and layer lookup shared by the built-in models.

Every check raises :class:`periodscan.errors.ConfigError` with the standard message (field,
allowed, got), so a bad model option fails at construction, before any training starts.
"""

from __future__ import annotations

from collections.abc import Sequence
from numbers import Integral, Real

from torch import nn

from periodscan.errors import bad_value

#: What each input rank means, for error messages; rank = len(input_shape).
RANK_NAMES = {2: "a (C, L) signal shape", 3: "a (C, H, W) image shape"}
#: Built-in model options that take data of a rank, named when a model does not fit the data.
SUITED = {2: " (for signals use model=cnn1d, cnn1d_bn or mlp)",
          3: " (for images use model=cnn2d, tiny_resnet or mlp)"}


def _is_int(value: object) -> bool:
    return isinstance(value, Integral) and not isinstance(value, bool)


def check_int(field: str, value: object, minimum: int) -> int:
    """Return ``value`` as an int if it is an int >= ``minimum``."""
    if not _is_int(value) or value < minimum:
        raise bad_value(f"model.{field}", f"an int >= {minimum}", value)
    return int(value)


def check_bool(field: str, value: object) -> bool:
    """Return ``value`` if it is a bool (no truthy strings or ints)."""
    if not isinstance(value, bool):
        raise bad_value(f"model.{field}", "a bool (true or false)", value)
    return value


def check_dropout(value: object) -> float:
    """Return the dropout probability if it lies in [0, 1)."""
    if isinstance(value, bool) or not isinstance(value, Real) or not 0.0 <= value < 1.0:
        raise bad_value("model.dropout", "a float in [0, 1)", value)
    return float(value)


def check_int_list(
    field: str, value: object, minimum: int, length: int | None = None
) -> tuple[int, ...]:
    """Return a list of ints >= ``minimum`` (of exactly ``length`` items if given) as a tuple.

    Accepts any sequence, including the ``ListConfig`` that Hydra passes for YAML lists.
    """
    count = "" if length is None else f"{length} "
    allowed = f"a list of {count}ints >= {minimum}"
    if isinstance(value, (str, bytes)) or not isinstance(value, Sequence):
        raise bad_value(f"model.{field}", allowed, value)
    items = tuple(value)
    if length is not None and len(items) != length:
        raise bad_value(f"model.{field}", allowed, value)
    if not all(_is_int(v) and v >= minimum for v in items):
        raise bad_value(f"model.{field}", allowed, value)
    return tuple(int(v) for v in items)


def check_input(
    model: str, input_shape: object, num_classes: object, ranks: Sequence[int] | None
) -> tuple[tuple[int, ...], int]:
    """Validate the two arguments the engine passes to every model.

    Parameters
    ----------
    model : str
        Class name, used in the message when the rank does not fit.
    input_shape, num_classes
        As passed by the engine: shape of one example and number of classes.
    ranks : sequence of int or None
        Allowed values of ``len(input_shape)``; None accepts any rank.

    Returns
    -------
    (shape, num_classes) as a plain tuple of ints and an int.
    """
    shape = check_int_list("input_shape", input_shape, 1)
    if not shape:
        raise bad_value("model.input_shape", "a non-empty list of ints >= 1", input_shape)
    if ranks is not None and len(shape) not in ranks:
        allowed = " or ".join(RANK_NAMES.get(r, f"a rank-{r} shape") for r in ranks)
        hint = SUITED.get(len(shape), "")
        raise bad_value("model.input_shape", f"{allowed} for {model}{hint}", shape)
    return shape, check_int("num_classes", num_classes, 2)


def conv_and_norm(rank: int) -> tuple[type[nn.Module], type[nn.Module]]:
    """Conv and BatchNorm classes for inputs of shape (C, L) (rank 2) or (C, H, W) (rank 3)."""
    return {2: (nn.Conv1d, nn.BatchNorm1d), 3: (nn.Conv2d, nn.BatchNorm2d)}[rank]


def maybe_dropout(p: float) -> nn.Module:
    """``nn.Dropout(p)``, or an identity when ``p == 0`` so the model draws no random numbers."""
    return nn.Dropout(p) if p > 0 else nn.Identity()
