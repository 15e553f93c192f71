"""Trace of the Fisher information of a classifier's weights on a set of inputs, per layer.

The trace of the Fisher information is the mean squared norm of per-example gradients of the
log-likelihood,

    tr F = 1/N sum_n E_y ||d/dw log p(y | x_n, w)||^2,

and the estimators differ only in which labels ``y`` enter:

- ``empirical``: the observed label of each example (the "empirical Fisher");
- ``sampled``: ``samples`` labels per example drawn from the model's own predictive
  distribution, a Monte Carlo estimate of the Fisher proper;
- ``expected``: every class, weighted by the model's probability of it: the Fisher proper with
  no sampling noise, at ``num_classes`` times the cost.

Kunstner, Balles and Hennig (2019, "Limitations of the empirical Fisher approximation") explain
why the empirical and the proper Fisher differ. Two vectorised routes give the same numbers:
``torch.func.vmap(grad(...))`` over a ``functional_call`` (any model) and the layer-wise route of
:mod:`periodscan.fisher.layerwise` (standard layers only, several times faster on CPU).
"""

from __future__ import annotations

import torch
from torch.func import functional_call, grad, vmap

from periodscan.errors import ConfigError, bad_value
from periodscan.fisher import layerwise

ESTIMATORS = ("empirical", "sampled", "expected")
METHODS = ("auto", "layerwise", "vmap")
#: Layer name used for parameters registered on the model itself rather than on a submodule.
ROOT_LAYER = "_root"

LabelSets = list[tuple[torch.Tensor, torch.Tensor | None]]


def layer_of(parameter_name: str) -> str:
    """Name of the module that owns a parameter: ``features.0.weight`` -> ``features.0``."""
    return parameter_name.rsplit(".", 1)[0] if "." in parameter_name else ROOT_LAYER


def fisher_trace(
    model: torch.nn.Module,
    x: torch.Tensor,
    y: torch.Tensor | None = None,
    *,
    estimator: str = "empirical",
    samples: int = 1,
    gen: torch.Generator | None = None,
    method: str = "auto",
    chunk_size: int | None = 256,
) -> dict[str, float]:
    """Trace of the Fisher information of ``model``'s weights on inputs ``x``, per layer.

    The model is evaluated in eval mode (BatchNorm uses its running statistics, dropout is off):
    this is the Fisher of the function that the held-out evaluation measures, and it keeps
    examples independent (in train mode BatchNorm mixes them through batch statistics, so a
    per-example gradient would not be defined). Parameters, buffers, the model's train/eval
    mode, ``.grad`` fields and torch's global RNG are left as they were.

    Parameters
    ----------
    model : torch.nn.Module
        Classifier mapping (N, *shape) to logits (N, C).
    x : Tensor (N, *shape)
        Inputs; cast to the dtype of the model's parameters.
    y : Tensor (N,) of int64, optional
        Observed labels; needed by ``estimator="empirical"``, ignored otherwise.
    estimator : {"empirical", "sampled", "expected"}
        Which labels enter the log-likelihood (see the module docstring).
    samples : int
        Labels drawn per example by ``"sampled"``.
    gen : torch.Generator, optional
        Source of the sampled labels (a fresh unseeded generator if None).
    method : {"auto", "layerwise", "vmap"}
        ``auto`` takes the layer-wise route when the model allows it, else vmap.
    chunk_size : int or None
        Examples per vectorised chunk, to bound memory (the vmap route holds about
        ``chunk_size`` x parameters floats); None: all at once.

    Returns
    -------
    dict mapping the name of each module that owns parameters to its part of the trace; the
    total trace is the sum of the values (a trace is additive over parameter blocks).
    """
    _check_options(estimator, method, y)
    was_training = model.training
    model.eval()
    try:
        x = x.to(next(model.parameters()).dtype)
        labels = _label_sets(model, x, y, estimator, samples, gen)
        per_example = _squared_norms(model, x, labels, method, chunk_size)
    finally:
        model.train(was_training)
    return {name: float(v.double().mean()) for name, v in per_example.items()}


def _check_options(estimator: str, method: str, y: torch.Tensor | None) -> None:
    if estimator not in ESTIMATORS:
        raise bad_value("monitor.estimator", f"one of {_quoted(ESTIMATORS)}", estimator)
    if method not in METHODS:
        raise bad_value("monitor.method", f"one of {_quoted(METHODS)}", method)
    if estimator == "empirical" and y is None:
        raise ValueError("the empirical Fisher needs the observed labels y")


def _squared_norms(model, x, labels: LabelSets, method: str,
                   chunk_size: int | None) -> dict[str, torch.Tensor]:
    """Per-example weighted squared gradient norms by layer, by the route ``method`` names.

    ``auto`` and ``layerwise`` try the layer-wise route first; ``auto`` falls back to vmap
    for layers it does not handle, ``layerwise`` refuses such a model.
    """
    if method != "vmap" and layerwise.supports(model):
        found = _layerwise_in_chunks(model, x, labels, chunk_size or len(x))
        if found is not None:
            return found
    if method == "layerwise":
        raise ConfigError(
            f"The 'monitor.method' parameter must be 'auto' or 'vmap' for "
            f"{type(model).__name__}: it has layers the layer-wise route does not "
            f"handle (allowed: {', '.join(t.__name__ for t in layerwise.LAYERS)}, each "
            "called once). Got 'layerwise' instead.")
    return _vmap_squared_norms(model, x, labels, chunk_size)


def _label_sets(model, x, y, estimator, samples, gen) -> LabelSets:
    """(labels, weight per example) pairs whose weighted squared norms sum to the estimate."""
    if estimator == "empirical":
        return [(y, None)]
    with torch.no_grad():
        probs = torch.softmax(model(x), dim=1)  # eval mode: no buffer changes, no RNG draws
    if estimator == "expected":
        return [(torch.full((len(x),), c, dtype=torch.int64), probs[:, c])
                for c in range(probs.shape[1])]
    drawn = torch.multinomial(probs, samples, replacement=True,
                              generator=gen if gen is not None else torch.Generator())
    weight = torch.full((len(x),), 1.0 / samples, dtype=x.dtype)
    return [(drawn[:, k], weight) for k in range(samples)]


def _layerwise_in_chunks(model, x, labels: LabelSets,
                         chunk_size: int) -> dict[str, torch.Tensor] | None:
    """The layer-wise route, ``chunk_size`` examples at a time to bound memory."""
    parts = []
    for begin in range(0, len(x), chunk_size):
        part = slice(begin, begin + chunk_size)
        chunk = layerwise.squared_norms(
            model, x[part], [(y[part], None if w is None else w[part]) for y, w in labels])
        if chunk is None:
            return None
        parts.append(chunk)
    return {name or ROOT_LAYER: torch.cat([p[name] for p in parts]) for name in parts[0]}


def _vmap_squared_norms(model, x, labels: LabelSets, chunk_size) -> dict[str, torch.Tensor]:
    """Per-example weighted squared gradient norms by layer through ``vmap(grad(...))``."""
    params = {n: p.detach() for n, p in model.named_parameters()}
    buffers = {n: b.detach() for n, b in model.named_buffers()}

    def log_lik(p, xi, yi):
        logits = functional_call(model, (p, buffers), (xi.unsqueeze(0),))  # (1, C)
        return torch.log_softmax(logits, dim=1)[0].gather(0, yi.unsqueeze(0)).sum()

    def squares(xi, yi):
        by_layer: dict[str, torch.Tensor] = {}
        for name, g in grad(log_lik)(params, xi, yi).items():
            layer = layer_of(name)
            sq = g.square().sum()
            by_layer[layer] = by_layer[layer] + sq if layer in by_layer else sq
        return by_layer

    total: dict[str, torch.Tensor] = {}
    for y, weight in labels:
        part = vmap(squares, chunk_size=chunk_size)(x, y)
        for layer, sq in part.items():
            sq = sq if weight is None else sq * weight
            total[layer] = total[layer] + sq if layer in total else sq
    return total


def _quoted(options) -> str:
    return ", ".join(repr(o) for o in options)
